"""selection: Hsu's MCB against the worked example of REFERENCE_CHECKS.md, statsmodels'
residual mean square and, for two configurations, the one-sided paired t bound."""

import math

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from scipy import stats as st
from statsmodels.stats.anova import anova_lm

from runner.evidence.protocols import Resampling
from runner.evidence.selection import possibly_best

# REFERENCE_CHECKS.md, Hsu 1996 MCB worked example (numbers made up for the formula check)
EXAMPLE = [
    [0.912, 0.905, 0.921, 0.899, 0.915],
    [0.908, 0.903, 0.915, 0.902, 0.910],
    [0.890, 0.884, 0.899, 0.880, 0.893],
    [0.911, 0.899, 0.918, 0.894, 0.912],
]


def test_worked_example():
    """Hsu 1996, MCB: residual MS 4.75e-6, df 12, d 2.287, w 0.00315; intervals
    A [-0.00035, 0.00595], B [-0.00595, 0.00035], C [-0.02435, 0], D [-0.00675, 0]."""
    out = possibly_best(EXAMPLE, "max", constant="dunnett")
    assert out.residual_sd**2 == pytest.approx(4.75e-6, rel=1e-9)
    assert out.df == 12 and out.critical == pytest.approx(2.287, abs=5e-4)
    assert out.half_width == pytest.approx(0.00315, abs=5e-6)
    for got, want in zip(out.lower, [-0.00035, -0.00595, -0.02435, -0.00675]):
        assert got == pytest.approx(want, abs=5e-6)
    for got, want in zip(out.upper, [0.00595, 0.00035, 0.0, 0.0]):
        assert got == pytest.approx(want, abs=5e-6)
    assert out.possibly_best == (True, True, False, False)
    assert out.shortfall[0] == pytest.approx(0.00035, abs=5e-6)
    assert out.basis == "Hsu MCB"


def test_residual_mean_square_matches_statsmodels():
    """s^2 and df equal the residual of anova_lm on y ~ C(config) + C(seed)."""
    rng = np.random.default_rng(2)
    y = rng.normal(0, 1, (6, 4)) + rng.normal(0, 2, 4)
    frame = pd.DataFrame([{"y": y[i, s], "config": i, "seed": s} for i in range(6) for s in range(4)])
    table = anova_lm(smf.ols("y ~ C(config) + C(seed)", frame).fit())
    out = possibly_best(y)
    assert out.residual_sd**2 == pytest.approx(table.loc["Residual", "mean_sq"], rel=1e-10)
    assert out.df == table.loc["Residual", "df"]


def test_two_configurations_reduce_to_one_sided_paired_t():
    """k = 2: Dunnett's constant is t_{0.95, n-1} and w is the one-sided 95% paired t bound's
    half-width (scipy.stats.ttest_rel confidence interval, alternative 'greater')."""
    a = np.array([0.91, 0.93, 0.90, 0.94, 0.92, 0.95])
    b = np.array([0.90, 0.90, 0.91, 0.92, 0.90, 0.93])
    out = possibly_best([a, b], constant="dunnett")
    ci = st.ttest_rel(a, b, alternative="greater").confidence_interval(0.95)
    assert (a - b).mean() - out.half_width == pytest.approx(ci.low, rel=1e-9)


def test_smaller_is_better_mirrors():
    """goal 'min' on y equals goal 'max' on -y (advantage signed so positive is better)."""
    y = np.array(EXAMPLE)
    lo, hi = possibly_best(y, "min"), possibly_best(-y, "max")
    assert lo.possibly_best == hi.possibly_best == (False, False, True, False)
    assert lo.lower == pytest.approx(hi.lower) and lo.upper == pytest.approx(hi.upper)


def test_margin_equivalence_uses_both_bounds():
    """Schuirmann 1987 on the simultaneous bounds: within +-delta iff lower > -delta and
    upper < delta. A (upper 0.00595) is within 0.01 but not within 0.005."""
    out = possibly_best(EXAMPLE, margin=0.01, constant="dunnett")
    assert out.within_margin == (True, True, False, True)
    assert possibly_best(EXAMPLE, margin=0.005, constant="dunnett").within_margin == (False,) * 4


def test_resampling_widens_the_half_width():
    """With split redrawn per seed v = 1/n + n_val/n_train (Nadeau & Bengio 2003) replaces 1/n."""
    plain = possibly_best(EXAMPLE)
    wide = possibly_best(EXAMPLE, protocol=Resampling.resample(200, 800))
    assert wide.half_width / plain.half_width == pytest.approx(math.sqrt((1 / 5 + 0.25) / (1 / 5)), rel=1e-12)


def test_range_constant_is_tukeys():
    """Default constant: w = q s sqrt(1/n), q the studentized range quantile for k means
    at df (k-1)(n-1) (Tukey 1953; scipy.stats.studentized_range), so on the worked example
    w = 4.199 * 0.0021794 / sqrt(5) and D (advantage -0.0036) stays possibly best."""
    out = possibly_best(EXAMPLE)
    q = st.studentized_range.ppf(0.95, 4, 12)
    assert out.critical == pytest.approx(q, rel=1e-7)
    assert out.half_width == pytest.approx(q * math.sqrt(4.75e-6 / 5), rel=1e-7)
    assert out.possibly_best == (True, True, False, True)
    assert out.basis == "constrained MCB, studentized range"


def test_range_two_configurations_is_the_two_sided_paired_t():
    """k = 2 with the range constant: w is the two-sided 95% paired t half-width (scipy)."""
    a = np.array([0.91, 0.93, 0.90, 0.94, 0.92, 0.95])
    b = np.array([0.90, 0.90, 0.91, 0.92, 0.90, 0.93])
    ci = st.ttest_rel(a, b).confidence_interval(0.95)
    assert possibly_best([a, b]).half_width == pytest.approx((ci.high - ci.low) / 2, rel=1e-9)


def test_one_configuration_and_one_seed():
    """k = 1: trivially possibly best with no interval; n = 1: no verdict, nothing bounded."""
    single = possibly_best([[0.9, 0.91]])
    assert single.possibly_best == (True,) and single.lower is None
    one_seed = possibly_best([[0.9], [0.8], [0.7]])
    assert one_seed.possibly_best == (True, True, True) and one_seed.shortfall == (math.inf,) * 3
    assert one_seed.basis == "one seed: no verdict"


def test_zero_residual_variance_with_few_seeds_rules_nothing_out():
    """Every difference constant over 2 seeds: the exact one-sided sign-flip p of such a
    difference is 1/4 > alpha/(k-1), so no configuration is ruled out and nothing is bounded."""
    out = possibly_best([[0.90, 0.92], [0.89, 0.91], [0.88, 0.90]])
    assert out.basis.startswith("zero residual variance")
    assert out.possibly_best == (True, True, True)
    assert out.lower == (-math.inf,) * 3


def test_zero_residual_variance_with_enough_seeds_rules_out():
    """With 8 seeds 2/2^8 <= 0.05/3 pairs (range) and 1/2^8 <= 0.05/2 rivals (Dunnett): a
    difference constant over every seed rules a row out, and ties with the best are kept.
    With 6 seeds only the Dunnett form can: 1/64 <= 0.05/2, but 2/64 > 0.05/3."""
    rows = [[0.90] * 8, [0.90] * 8, [0.88] * 8]
    for constant in ("range", "dunnett"):
        out = possibly_best(rows, constant=constant)
        assert out.possibly_best == (True, True, False) and out.half_width == 0.0
    six = [r[:6] for r in rows]
    assert possibly_best(six).possibly_best == (True, True, True)
    assert possibly_best(six, constant="dunnett").possibly_best == (True, True, False)


def test_input_checks():
    with pytest.raises(ValueError):
        possibly_best([[0.9, np.nan], [0.8, 0.7]])
    with pytest.raises(ValueError):
        possibly_best(EXAMPLE, goal="up")
