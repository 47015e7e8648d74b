"""gate: run-to-run comparison against scipy.stats (sign-flip permutation, Welch) and
statsmodels' Holm; identical runs and zero spread are well defined."""

import numpy as np
import pytest
from scipy import stats as st
from statsmodels.stats.multitest import multipletests

from runner.evidence.gate import compare_runs, pairing
from runner.evidence.protocols import Resampling


def _perm(d):
    return st.permutation_test((np.asarray(d, float),), np.mean, permutation_type="samples", n_resamples=np.inf).pvalue


def test_identical_runs_show_no_shift_and_p_one():
    """Identical runs: p = 1 for every configuration, never 0, and no verdict of change."""
    old = [np.array([0.9, 0.91, 0.92])] * 4
    out = compare_runs(old, [o.copy() for o in old])
    assert all(c.p_value == 1.0 and c.verdict == "no shift shown" for c in out.changes)
    assert not out.failed


def test_paired_p_values_are_sign_flip_and_holm():
    """Per-configuration p = scipy.stats.permutation_test on new - old; adjusted = Holm
    (statsmodels multipletests)."""
    rng = np.random.default_rng(0)
    old = [rng.normal(0.9, 0.01, 8) for _ in range(5)]
    new = [o + rng.normal(0.004 * i, 0.01, 8) for i, o in enumerate(old)]
    out = compare_runs(old, new)
    raw = [_perm(n - o) for o, n in zip(old, new)]
    assert [c.p_value for c in out.changes] == pytest.approx(raw, rel=1e-12)
    assert [c.p_adjusted for c in out.changes] == pytest.approx(multipletests(raw, method="holm")[1].tolist())


def test_direction_follows_the_goal():
    """A constant drop of 0.02 on 10 seeds (p = 2/1024 from the exact count) regresses when
    larger is better and improves when smaller is better."""
    old = [np.linspace(0.8, 0.9, 10)]
    new = [old[0] - 0.02]
    assert compare_runs(old, new, goal="max").changes[0].verdict == "regressed"
    assert compare_runs(old, new, goal="min").changes[0].verdict == "improved"
    assert compare_runs(old, new).changes[0].p_value == pytest.approx(_perm(new[0] - old[0]))
    assert compare_runs(old, new).failed


def test_too_few_seeds_is_said():
    """With 3 paired seeds and 16 configurations the floor 16 * 2/2^3 > 0.05: no verdict can fire."""
    old = [np.array([0.9, 0.91, 0.92])] * 16
    new = [o - 0.05 for o in old]
    assert {c.verdict for c in compare_runs(old, new).changes} == {"too few seeds"}


def test_min_change_is_two_one_sided_tests_on_shifted_data():
    """With a minimum change m the p is min(1, 2 min(P_up(d - m), P_down(d + m))) from
    scipy's exact one-sided permutation tests on the shifted differences."""
    rng = np.random.default_rng(1)
    old = [rng.normal(0.9, 0.01, 7)]
    new = [old[0] + rng.normal(0.02, 0.01, 7)]
    d, m = new[0] - old[0], 0.01
    up = st.permutation_test(
        (d - m,), np.mean, permutation_type="samples", n_resamples=np.inf, alternative="greater"
    ).pvalue
    down = st.permutation_test(
        (d + m,), np.mean, permutation_type="samples", n_resamples=np.inf, alternative="less"
    ).pvalue
    assert compare_runs(old, new, min_change=m).changes[0].p_value == pytest.approx(min(1, 2 * min(up, down)))
    assert compare_runs(old, new, min_change=0.5).changes[0].p_value == 1.0


def test_unpaired_uses_welch():
    """Unpaired: p and interval equal scipy.stats.ttest_ind(equal_var=False)."""
    rng = np.random.default_rng(2)
    old, new = [rng.normal(0.9, 0.01, 6)], [rng.normal(0.91, 0.02, 5)]
    out = compare_runs(old, new, paired=False).changes[0]
    ref = st.ttest_ind(new[0], old[0], equal_var=False)
    ci = ref.confidence_interval(0.95)
    assert out.p_value == pytest.approx(ref.pvalue, rel=1e-10)
    assert (out.low, out.high) == (pytest.approx(ci.low, rel=1e-10), pytest.approx(ci.high, rel=1e-10))
    assert out.method.startswith("unpaired Welch")


def test_unpaired_without_spread_uses_the_permutation_bound():
    """Both sides constant and different: the exact two-sample permutation p 2/C(n1+n2, n1)
    (scipy.stats.permutation_test, independent, exact)."""
    old, new = [np.full(4, 0.90)], [np.full(4, 0.92)]
    out = compare_runs(old, new, paired=False).changes[0]
    ref = st.permutation_test(
        (new[0], old[0]), lambda x, y: np.mean(x) - np.mean(y), permutation_type="independent", n_resamples=np.inf
    ).pvalue
    assert out.p_value == pytest.approx(ref)
    same = compare_runs(old, [old[0].copy()], paired=False).changes[0]
    assert same.p_value == 1.0 and same.verdict == "no shift shown"


def test_resampled_protocol_uses_corrected_t():
    d = np.array([0.012, 0.020, 0.005, 0.018, 0.010])
    old = [np.full(5, 0.9)]
    out = compare_runs(old, [old[0] + d], protocol=Resampling.resample(2, 6)).changes[0]
    assert out.p_value == pytest.approx(0.0430, abs=1e-4)  # Nadeau & Bengio worked example


def test_pairing_rules():
    assert pairing([1, 2, 3], [1, 2, 3], True, True).paired
    assert not pairing([1, 2, 3], [1, 2, 3], False, True).paired
    assert "split" in pairing([1, 2, 3], [1, 2, 3], True, False).reason
    assert not pairing([1, 2], [2, 3], True, True).paired
