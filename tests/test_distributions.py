"""distributions: normal, t and F functions held to scipy.stats (and mpmath where scipy's own
quantile is less precise than ours)."""

import math

import numpy as np
import pytest
from scipy import special as sp
from scipy import stats as st

from runner.evidence import distributions as D

DFS = list(range(1, 31)) + [35, 50, 75, 100, 120, 200, 333, 500, 750, 1000, 1.5, 2.5, 17.776]
TAIL = np.logspace(-8, math.log10(0.49), 30)
PROBS = np.concatenate([TAIL, [0.5], 1 - TAIL])


@pytest.mark.parametrize("df", DFS)
def test_t_cdf_and_sf_match_scipy(df):
    """t cdf and sf equal scipy.stats.t to 1e-12 relative at quantiles for p in 1e-8..1-1e-8."""
    for p in PROBS:
        x = st.t.ppf(p, df)
        assert D.t_cdf(x, df) == pytest.approx(st.t.cdf(x, df), rel=1e-12, abs=0)
        assert D.t_sf(x, df) == pytest.approx(st.t.sf(x, df), rel=1e-12, abs=0)


@pytest.mark.parametrize("df", DFS)
def test_t_quantiles_match_scipy(df):
    """t ppf/isf equal scipy.stats.t.ppf/isf to 1e-12 relative for |p - 1/2| >= 0.01."""
    for p in PROBS[np.abs(PROBS - 0.5) >= 0.01]:
        assert D.t_ppf(p, df) == pytest.approx(st.t.ppf(p, df), rel=1e-12, abs=0)
        assert D.t_isf(p, df) == pytest.approx(st.t.isf(p, df), rel=1e-12, abs=0)
    assert D.t_ppf(0.5, df) == 0.0


@pytest.mark.parametrize("df", [1, 3, 4, 10, 30, 1000])
@pytest.mark.parametrize("p", [0.49, 0.499, 0.4999, 0.5001, 0.501, 0.51])
def test_t_quantile_near_centre_keeps_relative_precision(df, p):
    """Within 0.01 of the centre scipy.stats.t.ppf is off by up to ~2e-9 relative (checked with
    mpmath at 40 digits), so the central mass P(0 < T < t) = |p - 1/2| is checked instead,
    through scipy.stats.t.sf, and the quantile against mpmath."""
    q = D.t_ppf(p, df)
    assert abs(0.5 - st.t.sf(abs(q), df)) == pytest.approx(abs(p - 0.5), rel=1e-12)
    mp = pytest.importorskip("mpmath")
    mp.mp.dps = 40
    central = lambda t: mp.betainc(mp.mpf(1) / 2, mp.mpf(df) / 2, 0, t * t / (df + t * t), regularized=True) / 2
    ref = mp.findroot(lambda t: central(t) - (mp.mpf(p) - mp.mpf(1) / 2) * mp.sign(p - 0.5), mp.mpf(q))
    assert q == pytest.approx(float(ref), rel=1e-13)


def test_t_critical_values_from_tables():
    """Two-sided 95% t critical values from standard tables (REFERENCE_CHECKS.md)."""
    for df, value in [(1, 12.7062), (2, 4.3027), (4, 2.7764), (9, 2.2622), (29, 2.0452)]:
        assert D.t_ppf(0.975, df) == pytest.approx(value, abs=1e-4)
    assert D.norm_ppf(0.975) == pytest.approx(1.95996, abs=1e-5)


def test_t_infinite_df_is_normal():
    assert D.t_sf(1.3, math.inf) == pytest.approx(st.norm.sf(1.3), rel=1e-14)


def test_normal_functions_match_scipy():
    """norm cdf/sf/ppf/isf equal scipy.stats.norm to 1e-12 relative for p in 1e-8..1-1e-8."""
    for p in PROBS:
        z = st.norm.ppf(p)
        if p != 0.5:
            assert D.norm_ppf(p) == pytest.approx(z, rel=1e-12)
            assert D.norm_isf(p) == pytest.approx(st.norm.isf(p), rel=1e-12)
        assert D.norm_cdf(z) == pytest.approx(st.norm.cdf(z), rel=1e-12)
        assert D.norm_sf(z) == pytest.approx(st.norm.sf(z), rel=1e-12)


def test_normal_cdf_array_absolute_error():
    """The table-based array cdf is within 1e-13 of scipy.special.ndtr everywhere."""
    x = np.concatenate([np.random.default_rng(0).uniform(-12, 12, 50_000), np.linspace(-9, 9, 20_001)])
    assert np.abs(D.norm_cdf_array(x) - sp.ndtr(x)).max() < 1e-13


@pytest.mark.parametrize("dfn", [1, 2, 3, 9, 63, 200])
@pytest.mark.parametrize("dfd", [1, 4, 12, 100, 5000])
def test_f_sf_and_isf(dfn, dfd):
    """F sf equals scipy.stats.f.sf to 1e-12; F isf is checked by its round trip through
    scipy.stats.f.sf (scipy's own f.isf is off by ~5e-9 in probability at q = 1e-8)."""
    for q in [1e-8, 1e-4, 0.01, 0.05, 0.3, 0.7, 0.99]:
        f = st.f.isf(q, dfn, dfd)
        assert D.f_sf(f, dfn, dfd) == pytest.approx(st.f.sf(f, dfn, dfd), rel=1e-12)
        assert st.f.sf(D.f_isf(q, dfn, dfd), dfn, dfd) == pytest.approx(q, rel=1e-12)


@pytest.mark.parametrize("df", [1, 2, 3, 5, 12, 30, 100, 1000])
def test_chi_nodes_reproduce_the_t_cdf(df):
    """E[Phi(c S)] over the nodes is P(T <= c) (Student's t as a normal over a scaled chi),
    checked against scipy.stats.t.cdf to 1e-9, and E[S^2] = 1."""
    s, w = D.scaled_chi_nodes(df)
    assert float(np.sum(w * s * s)) == pytest.approx(1.0, abs=1e-9)
    for c in [-30, -3, -1, 0.5, 2, 5, 20]:
        assert float(np.sum(w * D.norm_cdf_array(c * s))) == pytest.approx(st.t.cdf(c, df), abs=1e-9)


def test_invalid_arguments_are_refused():
    with pytest.raises(ValueError):
        D.t_sf(1.0, 0)
    with pytest.raises(ValueError):
        D.t_isf(1.5, 3)
