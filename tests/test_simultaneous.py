"""simultaneous: Dunnett's one-sided constant and the studentized range quantile against
scipy.stats (multivariate_t, multivariate_normal, dunnett, studentized_range), the t
quantile and the orthant identity."""

import math

import numpy as np
import pytest
from scipy import stats as st

from runner.evidence.simultaneous import dunnett_cdf, dunnett_one_sided, range_cdf, range_quantile


def _corr(m):
    c = np.full((m, m), 0.5)
    np.fill_diagonal(c, 1.0)
    return c


@pytest.mark.parametrize("m, df, table", [(4, 20, 2.304), (2, 10, 2.151), (7, 30, 2.453), (3, 12, 2.287)])
def test_constants_from_reference_checks(m, df, table):
    """REFERENCE_CHECKS.md (scipy.stats.multivariate_t): 2.304, 2.151, 2.453; and 2.287 of the
    MCB worked example. Dunnett's 1955 table gives 2.30 and 2.15 (from memory)."""
    assert dunnett_one_sided(m, df) == pytest.approx(table, abs=5e-4)


@pytest.mark.parametrize("m, df", [(4, 20), (2, 10), (7, 30), (15, 45)])
def test_multivariate_t_cdf_at_the_constant_is_0_95(m, df):
    """scipy.stats.multivariate_t(shape = 0.5-equicorrelation, df).cdf(d, ..., d) = 0.95 within
    its quasi-Monte Carlo error (a few 1e-6 with 2e6 points)."""
    d = dunnett_one_sided(m, df)
    ref = st.multivariate_t(shape=_corr(m), df=df).cdf(np.full(m, d), maxpts=2_000_000, random_state=1)
    assert ref == pytest.approx(0.95, abs=2e-5)


def test_scipy_dunnett_p_value_at_the_constant():
    """scipy.stats.dunnett: a one-sided many-to-one statistic equal to d has adjusted p 0.05.
    Built from 3 treatments and a control of 5 observations each (df 16), shifted so the
    largest treatment's t statistic equals d and the others sit far below."""
    rng = np.random.default_rng(0)
    groups = [rng.normal(0, 1, 5) for _ in range(4)]
    control = groups[0]
    pooled = np.sqrt(np.mean([g.var(ddof=1) for g in groups]))
    d = dunnett_one_sided(3, 16)
    se = pooled * np.sqrt(2 / 5)
    shifted = [
        groups[1] - groups[1].mean() + control.mean() + d * se,
        groups[2] - groups[2].mean() + control.mean() - 50 * se,
        groups[3] - groups[3].mean() + control.mean() - 50 * se,
    ]
    res = st.dunnett(*shifted, control=control, alternative="greater", random_state=1)
    assert res.statistic[0] == pytest.approx(d, rel=1e-9)
    assert res.pvalue[0] == pytest.approx(0.05, abs=2e-4)


@pytest.mark.parametrize("df", [1, 2, 5, 40, math.inf])
def test_one_comparison_is_the_t_quantile(df):
    """m = 1: Dunnett's constant is the one-sided t quantile (scipy.stats.t.isf)."""
    assert dunnett_one_sided(1, df) == pytest.approx(
        st.t.isf(0.05, df) if df != math.inf else st.norm.isf(0.05), rel=1e-12
    )


@pytest.mark.parametrize("m", [1, 2, 5, 20, 63])
@pytest.mark.parametrize("df", [1, 4, 63, math.inf])
def test_orthant_probability(m, df):
    """P(all m equicorrelated (1/2) statistics <= 0) = 1/(m+1): by symmetry of (-U0, U1..Um)."""
    assert dunnett_cdf(0.0, m, df) == pytest.approx(1.0 / (m + 1), rel=1e-7)


@pytest.mark.parametrize("d", [0.5, 1.5, 2.5])
def test_known_variance_two_comparisons_match_bivariate_normal(d):
    """df = inf, m = 2: equal to scipy.stats.multivariate_normal's bivariate cdf (Genz)."""
    ref = st.multivariate_normal(mean=[0, 0], cov=_corr(2), abseps=1e-10, releps=1e-10).cdf([d, d])
    assert dunnett_cdf(d, 2, math.inf) == pytest.approx(ref, abs=1e-8)


def test_sixty_four_configurations_solve_at_one_relative_ppm():
    """63 comparisons (a board of 64): the cdf at the constant is 0.95 to 1e-7, by the
    1-D integral over the normal factor done by scipy for known variance."""
    d = dunnett_one_sided(63, math.inf)
    u = np.linspace(-10, 10, 40_001)
    ref = np.trapezoid(st.norm.pdf(u) * st.norm.cdf(np.sqrt(2) * d - u) ** 63, u)
    assert ref == pytest.approx(0.95, abs=1e-7)


def test_invalid_arguments():
    with pytest.raises(ValueError):
        dunnett_one_sided(0, 10)
    with pytest.raises(ValueError):
        dunnett_one_sided(3, 10, alpha=1.5)


@pytest.mark.parametrize("k, df", [(3, 10), (4, 20), (8, 21), (16, 45), (64, 63), (4, 3), (2, 7)])
def test_range_quantile_matches_scipy(k, df):
    """Studentized range quantile equals scipy.stats.studentized_range.ppf to 1e-7 relative."""
    assert range_quantile(k, df) == pytest.approx(st.studentized_range.ppf(0.95, k, df), rel=1e-7)


@pytest.mark.parametrize("q", [1.0, 3.0, 5.0])
def test_range_cdf_matches_scipy(q):
    assert range_cdf(q, 5, 12) == pytest.approx(st.studentized_range.cdf(q, 5, 12), abs=1e-9)


def test_range_of_two_means_is_the_t_quantile():
    """k = 2: q = sqrt(2) t_{0.975, df} (the range of two means is |difference|)."""
    assert range_quantile(2, 9) == pytest.approx(math.sqrt(2) * st.t.isf(0.025, 9), rel=1e-12)
