"""paired: the exact sign-flip test against scipy.stats.permutation_test, its floor, and the
corrected t against the worked example of Nadeau & Bengio 2003 (REFERENCE_CHECKS.md)."""

import itertools

import numpy as np
import pytest
from scipy import stats as st

from runner.evidence.paired import min_attainable_p, paired_difference, seeds_for_any_verdict, sign_flip_test
from runner.evidence.protocols import FIXED, Resampling


def _scipy_sign_flip(d, alternative="two-sided"):
    return st.permutation_test(
        (np.asarray(d, float),), np.mean, permutation_type="samples", n_resamples=np.inf, alternative=alternative
    ).pvalue


@pytest.mark.parametrize("seed", range(6))
@pytest.mark.parametrize("alternative", ["two-sided", "greater", "less"])
def test_sign_flip_matches_scipy_on_continuous_data(seed, alternative):
    """Equal to scipy.stats.permutation_test(permutation_type="samples", n_resamples=inf)."""
    rng = np.random.default_rng(seed)
    d = rng.normal(0.3, 1.0, 3 + seed)
    assert sign_flip_test(d, alternative).p_value == pytest.approx(_scipy_sign_flip(d, alternative), rel=1e-12)


def test_sign_flip_matches_scipy_on_tied_integer_data():
    """Ties and zeros (integer differences, exact in floating point) against scipy."""
    for d in ([1, 1, 2, 0, -1], [3, 3, 3], [0, 0, 1, 1], [2, -2, 2, -2, 1, 0], [1, 2, 3, 4, 5, 6, 7]):
        assert sign_flip_test(d).p_value == pytest.approx(_scipy_sign_flip(d), rel=1e-12)


def test_two_seeds_never_below_half_and_five_equal_give_0_0625():
    """REFERENCE_CHECKS.md: n = 2 gives p = 0.5; 5 equal positive differences give 0.0625."""
    assert sign_flip_test([0.01, 0.01]).p_value == 0.5
    assert sign_flip_test([0.03, 0.01]).p_value == 0.5
    assert sign_flip_test([0.02] * 5).p_value == pytest.approx(0.0625)
    assert _scipy_sign_flip([0.02] * 5) == pytest.approx(0.0625)


def test_zero_differences_give_one():
    """All-zero differences are no evidence: p = 1, never 0."""
    assert sign_flip_test([0.0, 0.0, 0.0]).p_value == 1.0


def test_decimal_ties_count_as_ties():
    """Differences of decimals equal on paper (0.93 - 0.92 vs 0.95 - 0.94) tie: with two
    such differences of opposite sign the sum is 0 and p = 1 (hand count of the 4 patterns)."""
    assert sign_flip_test([0.93 - 0.92, 0.94 - 0.95]).p_value == 1.0


def test_min_attainable_p_is_reached():
    """The floor 2/2^n is the p of n equal positive differences (counted by scipy)."""
    for n in range(1, 9):
        assert min_attainable_p(n) == pytest.approx(2.0 / 2**n if n > 1 else 1.0)
        if n >= 2:
            assert min_attainable_p(n) == pytest.approx(_scipy_sign_flip([1.0] * n))
    assert seeds_for_any_verdict(0.05) == 6
    assert seeds_for_any_verdict(0.05, comparisons=16) == 10


def test_shifted_test_is_the_test_of_shifted_data():
    d = np.array([0.5, 0.7, 0.2, 0.9])
    assert sign_flip_test(d, "greater", shift=0.1).p_value == pytest.approx(_scipy_sign_flip(d - 0.1, "greater"))


def test_monte_carlo_above_exact_limit_needs_a_generator():
    """Above 20 seeds the patterns are drawn; the p agrees with scipy's own Monte Carlo
    version within Monte Carlo error, and the (1 + hits)/(1 + B) form is never 0."""
    rng = np.random.default_rng(3)
    d = rng.normal(0.2, 1.0, 24)
    with pytest.raises(ValueError):
        sign_flip_test(d)
    ours = sign_flip_test(d, rng=np.random.default_rng(0), resamples=200_000)
    ref = st.permutation_test((d,), np.mean, permutation_type="samples", n_resamples=200_000, random_state=1).pvalue
    assert not ours.exact and abs(ours.p_value - ref) < 4 * np.sqrt(ref * (1 - ref) / 200_000) * 2
    assert sign_flip_test(np.full(24, 1.0), rng=np.random.default_rng(0), resamples=1000).p_value > 0


def test_corrected_resampled_t_worked_example():
    """Nadeau & Bengio 2003 worked example (REFERENCE_CHECKS.md): plain t 4.7789 (p 0.0088),
    corrected t 2.9265 (p 0.0430) with n_test/n_train = 0.2/0.6; plain equals scipy.stats.ttest_1samp."""
    d = [0.012, 0.020, 0.005, 0.018, 0.010]
    plain = paired_difference(d)
    assert plain.t == pytest.approx(4.7789, abs=1e-4)
    assert plain.t_p_value == pytest.approx(0.0088, abs=1e-4)
    assert plain.t == pytest.approx(st.ttest_1samp(d, 0).statistic, rel=1e-12)
    assert plain.t_p_value == pytest.approx(st.ttest_1samp(d, 0).pvalue, rel=1e-10)
    corrected = paired_difference(d, Resampling.resample(n_val=2, n_train=6))
    assert corrected.t == pytest.approx(2.9265, abs=1e-4)
    assert corrected.p_value == pytest.approx(0.0430, abs=1e-4)
    assert corrected.basis.startswith("corrected t")


def test_fixed_split_verdict_uses_sign_flip_and_interval_uses_t():
    d = [0.012, 0.020, 0.005, 0.018, 0.010]
    out = paired_difference(d, FIXED)
    assert out.p_value == pytest.approx(0.0625) and out.basis == "exact sign-flip test"
    ci = st.ttest_1samp(d, 0).confidence_interval(0.95)
    assert (out.low, out.high) == (pytest.approx(ci.low, rel=1e-12), pytest.approx(ci.high, rel=1e-12))


def test_zero_spread_is_well_defined():
    """Constant differences: no t and no interval; fixed split: the sign-flip p (0.5 for 2
    seeds); redrawn splits: p = 1 (no verdict)."""
    out = paired_difference([0.01, 0.01])
    assert out.t is None and out.low is None and out.p_value == 0.5
    out = paired_difference([0.01] * 5, Resampling.resample(2, 6))
    assert out.p_value == 1.0 and "undefined" in out.basis
    assert paired_difference([0.3]).p_value == 1.0


def test_protocol_variance_factors():
    """1/n fixed; 1/n + n_val/n_train (Nadeau & Bengio 2003); repeated k-fold 1/(kr) + 1/(k-1)
    (Bouckaert & Frank 2004, from memory)."""
    assert FIXED.variance_factor(5) == pytest.approx(0.2)
    assert Resampling.resample(100, 400).variance_factor(5) == pytest.approx(0.2 + 0.25)
    assert Resampling.repeated_kfold(10, 10).variance_factor(100) == pytest.approx(0.01 + 1 / 9)
    with pytest.raises(ValueError):
        Resampling.repeated_kfold(10, 10).variance_factor(50)
    with pytest.raises(ValueError):
        Resampling("bootstrap")
    with pytest.raises(ValueError):
        Resampling.resample(0, 10)


def test_exact_count_by_enumeration():
    """Two-sided p is the share of the 2^n patterns at least as extreme (itertools count)."""
    d = np.array([0.4, -0.1, 0.3, 0.25, 0.05, 0.6])
    obs = d.sum()
    sums = [np.dot(s, d) for s in itertools.product([1, -1], repeat=d.size)]
    expected = min(1, 2 * min(np.mean([x >= obs - 1e-12 for x in sums]), np.mean([x <= obs + 1e-12 for x in sums])))
    assert sign_flip_test(d).p_value == pytest.approx(expected)
