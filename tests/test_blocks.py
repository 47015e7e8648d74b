"""blocks: the two-way analysis with seeds as blocks against statsmodels' anova_lm and OLS
intervals, Scheffe intervals against scipy.stats.f, matched effects against scipy.stats."""

import math

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from scipy import stats as st
from statsmodels.stats.anova import anova_lm

from runner.evidence.blocks import interaction_contrasts, matched_difference, two_way_blocks
from runner.evidence.protocols import Resampling


def _table(a, b, n, seed, interaction=0.0):
    rng = np.random.default_rng(seed)
    y = rng.normal(0, 1, (a, b, n)) + rng.normal(0, 2, n)[None, None, :]
    y[-1, -1, :] += interaction
    return y


def _fit(y):
    a, b, n = y.shape
    frame = pd.DataFrame(
        [{"y": y[i, j, s], "A": i, "B": j, "seed": s} for i in range(a) for j in range(b) for s in range(n)]
    )
    return smf.ols("y ~ C(seed) + C(A) * C(B)", frame).fit()


@pytest.mark.parametrize("shape, seed", [((2, 2, 3), 0), ((3, 2, 4), 1), ((3, 4, 5), 2), ((2, 3, 2), 3)])
def test_f_tests_match_statsmodels(shape, seed):
    """F and p of A, B, A x B and seeds equal anova_lm on y ~ C(seed) + C(A) * C(B)."""
    y = _table(*shape, seed, interaction=1.5)
    ref = anova_lm(_fit(y))
    out = two_way_blocks(y)
    for effect, row in [(out.a, "C(A)"), (out.b, "C(B)"), (out.interaction, "C(A):C(B)"), (out.seeds, "C(seed)")]:
        assert effect.ss == pytest.approx(ref.loc[row, "sum_sq"], rel=1e-10)
        assert effect.df == ref.loc[row, "df"]
        assert effect.f == pytest.approx(ref.loc[row, "F"], rel=1e-10)
        assert effect.p_value == pytest.approx(ref.loc[row, "PR(>F)"], rel=1e-9)
    assert out.residual_df == ref.loc["Residual", "df"]


def test_two_by_two_contrast_interval_is_the_ols_interval():
    """2 x 2: the interaction contrast and its interval equal the OLS coefficient of
    C(A)[T.1]:C(B)[T.1] and its 95% confidence interval (statsmodels)."""
    y = _table(2, 2, 4, 5, interaction=3.0)
    fit = _fit(y)
    name = "C(A)[T.1]:C(B)[T.1]"
    (c,) = interaction_contrasts(y)
    assert c.estimate == pytest.approx(fit.params[name], rel=1e-10)
    assert (c.low, c.high) == (
        pytest.approx(fit.conf_int().loc[name, 0], rel=1e-9),
        pytest.approx(fit.conf_int().loc[name, 1], rel=1e-9),
    )


def test_scheffe_half_width_for_larger_tables():
    """3 x 3: half-width sqrt(q F_q,df(0.95)) s sqrt(4/n) with q = 4 (Scheffe 1953; F from scipy)."""
    y = _table(3, 3, 4, 7)
    out = two_way_blocks(y)
    contrasts = interaction_contrasts(y)
    assert len(contrasts) == 9
    half = math.sqrt(4 * st.f.isf(0.05, 4, out.residual_df)) * math.sqrt(out.residual_ms * 4 / 4)
    c = contrasts[0]
    assert (c.high - c.low) / 2 == pytest.approx(half, rel=1e-10)


def test_scheffe_claims_agree_with_the_f_test():
    """No contrast is claimed when the interaction F test does not reject (Scheffe's
    intervals are the F test's dual), checked over random tables without interaction."""
    for seed in range(30):
        y = _table(3, 3, 3, 100 + seed)
        if two_way_blocks(y).interaction.p_value > 0.05:
            assert not any(c.claimed for c in interaction_contrasts(y))


def test_strong_interaction_is_claimed():
    y = _table(2, 2, 5, 9, interaction=10.0)
    assert interaction_contrasts(y)[0].claimed


def test_resampling_divides_f_by_n_v():
    y = _table(2, 2, 5, 11, interaction=2.0)
    plain, wide = two_way_blocks(y), two_way_blocks(y, Resampling.resample(100, 300))
    assert wide.interaction.f == pytest.approx(plain.interaction.f / (5 * (1 / 5 + 1 / 3)), rel=1e-12)


def test_zero_residual_variance_gives_no_f():
    y = np.zeros((2, 2, 3)) + np.array([0.1, 0.2, 0.3])
    y[1, 1] += 0.05
    out = two_way_blocks(y)
    assert out.interaction.f is None and out.interaction.p_value is None
    assert interaction_contrasts(y)[0].low is None and not interaction_contrasts(y)[0].claimed


def test_matched_difference_is_a_one_sample_t_on_seed_means():
    """Level 2 vs level 0 of the first factor of a 3 x 2 x 2 x n table: per seed, the mean
    of the matched differences; interval equals scipy.stats.ttest_1samp on those means."""
    rng = np.random.default_rng(4)
    y = rng.normal(0, 1, (3, 2, 2, 6))
    per_seed = np.array(
        [np.mean([y[2, j, k, s] - y[0, j, k, s] for j in range(2) for k in range(2)]) for s in range(6)]
    )
    out = matched_difference(y, axis=0, level=2, base=0)
    ref = st.ttest_1samp(per_seed, 0)
    ci = ref.confidence_interval(0.95)
    assert out.mean == pytest.approx(per_seed.mean(), rel=1e-12)
    assert (out.low, out.high) == (pytest.approx(ci.low, rel=1e-10), pytest.approx(ci.high, rel=1e-10))
    assert out.t_p_value == pytest.approx(ref.pvalue, rel=1e-9)
    with pytest.raises(ValueError):
        matched_difference(y, axis=3, level=1, base=0)
