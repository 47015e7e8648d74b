"""stats: checked against scipy.stats, statsmodels, standard t tables and worked examples."""

import numpy as np
import pytest
from scipy import stats as st
from statsmodels.stats.multitest import multipletests

from runner.evidence import stats

# Student 1908 (Biometrika 6:1-25), the sleep data: extra hours of sleep under two drugs.
SLEEP_1 = [0.7, -1.6, -0.2, -1.2, -0.1, 3.4, 3.7, 0.8, 0.0, 2.0]
SLEEP_2 = [1.9, 0.8, 1.1, 0.1, -0.1, 4.4, 5.5, 1.6, 4.6, 3.4]


def test_t_critical_value_4_df():
    """Two-sided 95% t critical value for 4 df is 2.7764 (standard t table)."""
    values = [0.952, 0.961, 0.947, 0.958, 0.955]
    mean, sd, (lo, hi) = stats.t_interval(values)
    half = (hi - lo) / 2
    assert half / (sd / np.sqrt(5)) == pytest.approx(2.7764, abs=1e-4)
    assert half / (sd / np.sqrt(5)) == pytest.approx(st.t.ppf(0.975, 4), rel=1e-12)


def test_worked_interval_uses_ddof_1():
    """Worked example: mean 0.9546, sd (ddof 1) 0.0054129, 95% CI [0.947879, 0.961321]."""
    mean, sd, (lo, hi) = stats.t_interval([0.952, 0.961, 0.947, 0.958, 0.955])
    assert mean == pytest.approx(0.9546, abs=1e-12)
    assert sd == pytest.approx(0.0054129, abs=1e-7)
    assert (lo, hi) == (pytest.approx(0.947879, abs=1e-6), pytest.approx(0.961321, abs=1e-6))


def test_interval_absent_below_two_values():
    assert stats.t_interval([0.9]) == (0.9, None, None)
    assert stats.summarize([0.9])["ci95"] is None


def test_paired_t_on_student_sleep_data():
    """Paired t on the sleep data: t -4.062128, df 9, p 0.0028329, CI (-2.459886, -0.700114);
    equal to scipy.stats.ttest_rel."""
    out = stats.paired(SLEEP_1, SLEEP_2)
    ref = st.ttest_rel(SLEEP_1, SLEEP_2)
    assert out["t"] == pytest.approx(ref.statistic, rel=1e-12)
    assert out["p_value"] == pytest.approx(ref.pvalue, rel=1e-10)
    assert out["t"] == pytest.approx(-4.062128, abs=1e-6)
    assert out["p_value"] == pytest.approx(0.0028329, abs=1e-7)
    assert out["diff_mean"] == pytest.approx(-1.58)
    assert out["ci95"] == [pytest.approx(-2.459886, abs=1e-6), pytest.approx(-0.700114, abs=1e-6)]


@pytest.mark.parametrize("seed", range(5))
def test_paired_matches_scipy_on_random_vectors(seed):
    rng = np.random.default_rng(seed)
    a, b = rng.normal(0.9, 0.02, 6), rng.normal(0.9, 0.02, 6)
    assert stats.paired(a, b)["p_value"] == pytest.approx(st.ttest_rel(a, b).pvalue, rel=1e-10)


def test_welch_on_sleep_data_matches_scipy():
    """Unpaired Welch on the sleep data: t -1.8608, df 17.776, p 0.07939 (scipy ttest_ind)."""
    out = stats.welch(SLEEP_1, SLEEP_2)
    ref = st.ttest_ind(SLEEP_1, SLEEP_2, equal_var=False)
    assert out["t"] == pytest.approx(ref.statistic, rel=1e-12)
    assert out["p_value"] == pytest.approx(ref.pvalue, rel=1e-10)
    assert out["df"] == pytest.approx(17.776, abs=1e-3)
    ci = ref.confidence_interval(0.95)
    assert out["ci95"] == [pytest.approx(ci.low, rel=1e-10), pytest.approx(ci.high, rel=1e-10)]


def test_holm_hand_example_and_statsmodels():
    """Holm 1979: p = 0.01, 0.04, 0.03 (m = 3) -> 0.03, 0.06, 0.06; equal to statsmodels."""
    assert stats.holm([0.01, 0.04, 0.03]) == pytest.approx([0.03, 0.06, 0.06])
    rng = np.random.default_rng(0)
    p = rng.uniform(0, 0.2, 9)
    assert stats.holm(p) == pytest.approx(multipletests(p, method="holm")[1].tolist())


def test_wilcoxon_floor_for_five_seeds():
    """Exact signed-rank test: with 5 pairs the smallest two-sided p is 2/2**5 = 0.0625."""
    assert stats.wilcoxon_p([1, 2, 3, 4, 5], [0, 0, 0, 0, 0]) == pytest.approx(0.0625)
    assert stats.wilcoxon_p([1, 2, 3, 4, 5, 6], [0] * 6) == pytest.approx(0.03125)


def test_identical_vectors_are_no_evidence():
    assert stats.paired([0.9, 0.8, 0.7], [0.9, 0.8, 0.7])["p_value"] == 1.0
