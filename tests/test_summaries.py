"""summaries: the scale-free numbers the flags read, against scipy, statsmodels, sklearn and
the published formulas they come from."""

import math

import numpy as np
import pytest
from scipy import stats
from sklearn.metrics import log_loss
from statsmodels.stats.proportion import proportion_confint

from runner.training import summaries


@pytest.mark.parametrize(
    "values",
    [
        [0.30, 0.35, 0.33, 0.40, 0.42, 0.41, 0.47, 0.50],  # rising with noise
        [0.97, 0.97, 0.975, 0.97, 0.9725, 0.975, 0.97, 0.975],  # flat, many ties (a coarse metric)
        [0.9, 0.8, 0.85, 0.7, 0.6],  # falling
        [1.0, 2.0, 3.0, 4.0, 5.0, 6.0],  # strictly rising, no ties
    ],
)
def test_mann_kendall_equals_scipy_kendalltau_against_time(values):
    """Mann (1945): Kendall's tau of the values against time, tie-corrected variance, normal
    approximation: scipy.stats.kendalltau(method="asymptotic") gives the two-sided p."""
    ref = stats.kendalltau(np.arange(len(values)), values, method="asymptotic")
    one_sided_up = ref.pvalue / 2 if ref.statistic > 0 else 1 - ref.pvalue / 2
    assert summaries.mann_kendall_up(values) == pytest.approx(one_sided_up, rel=1e-12)


def test_mann_kendall_of_a_constant_curve_is_no_trend():
    assert summaries.mann_kendall_up([0.5] * 8) == 1.0


@pytest.mark.parametrize("values", [[0.3, 0.35, 0.33, 0.4, 0.42, 0.41, 0.47, 0.5], [5.0, 1.0, 4.0, 2.0, 3.0]])
def test_theil_sen_equals_scipy(values):
    """Sen (1968): the median pairwise slope, as scipy.stats.theilslopes."""
    assert summaries.theil_sen(values) == pytest.approx(stats.theilslopes(values).slope, rel=1e-12)


def test_tail_trend_of_a_steady_climb_and_of_a_converged_curve():
    """A curve climbing steadily to its last epoch (plain SGD at too small a rate) has a
    significant trend worth about W-1 / (E-1) of its range with the best epoch at the end; a
    curve that levelled off long before (exponential approach plus noise) has neither."""
    rng = np.random.default_rng(0)
    epochs = 30
    climb = list(0.28 + 0.27 * np.arange(epochs) / (epochs - 1) + rng.normal(0, 0.005, epochs))
    t = summaries.tail_trend(climb, higher_is_better=True, budget=epochs)
    assert t["tail_epochs"] == 8  # max(5, ceil(30 / 4))
    assert t["tail_trend_p"] < 0.01 and t["tail_has_best"]
    assert t["tail_gain_share"] == pytest.approx(7 / 29, abs=0.05)
    flat = list(0.97 - 0.6 * np.exp(-np.arange(epochs) / 2.0) + rng.normal(0, 0.004, epochs))
    f = summaries.tail_trend(flat, higher_is_better=True, budget=epochs)
    assert f["tail_gain_share"] < 0.05
    # a loss-like metric (lower is better) is oriented before judging
    down = summaries.tail_trend([2 - v for v in climb], higher_is_better=False, budget=epochs)
    assert down["tail_trend_p"] == pytest.approx(t["tail_trend_p"]) and down["tail_has_best"]


def test_tail_trend_is_not_judged_for_a_run_cut_short_or_too_short():
    assert summaries.tail_trend([0.1, 0.2, 0.3, 0.4, 0.5, 0.6], True, budget=30)["tail_trend_p"] is None
    assert summaries.tail_trend([0.1, 0.2, 0.3, 0.4], True, budget=4)["tail_trend_p"] is None


def test_loss_rise_is_zero_for_a_falling_curve_and_scale_free():
    falling = [2.3, 1.1, 0.6, 0.4, 0.3, 0.25]
    assert summaries.loss_rise(falling) == 0.0
    spiky = [2.0, 1.1, 0.6, 1.5, 0.4, 0.9, 0.3]
    rise = summaries.loss_rise(spiky)
    assert rise == pytest.approx((1.5 - 0.6) / 2.0)  # the largest climb above the low so far
    # the same curve in other units gives the same number
    assert summaries.loss_rise([1000 * v for v in spiky]) == pytest.approx(rise)
    # a curve that barely moves is not unstable for its noise, however long it runs
    assert summaries.loss_rise([2.302, 2.301, 2.302, 2.300, 2.301, 2.300] * 50) < 0.001


def test_scaled_gap_units():
    assert summaries.scaled_gap(0.05, "accuracy", None, 10) == 0.05
    assert summaries.scaled_gap(7.7, "rmse", 77.0, None) == pytest.approx(0.1)
    assert summaries.scaled_gap(math.log(10) / 10, "log_loss", None, 10) == pytest.approx(0.1)
    assert summaries.scaled_gap(0.2, "rmse", None, None) is None


@pytest.mark.parametrize("errors,rows", [(0, 30), (3, 30), (11, 360), (120, 360), (30, 30)])
def test_upper_error_is_the_clopper_pearson_bound(errors, rows):
    """Clopper & Pearson (1934): the one-sided 95% upper bound is the upper end of the
    two-sided 90% interval, statsmodels' proportion_confint(method="beta")."""
    upper = proportion_confint(errors, rows, alpha=0.10, method="beta")[1]
    assert summaries.upper_error(errors, rows) == pytest.approx(upper, rel=1e-9)
    if errors == 0:  # the closed form with no errors
        assert summaries.upper_error(0, rows) == pytest.approx(1 - 0.05 ** (1 / rows), rel=1e-9)


@pytest.mark.parametrize("classes", [2, 3, 10])
@pytest.mark.parametrize("error", [0.01, 0.1, 0.3])
def test_fano_bound_is_the_entropy_of_the_distribution_that_attains_it(error, classes):
    """Fano (1961): H(Y | p) <= h(e) + e ln(K - 1), with equality for the distribution that
    puts 1 - e on the guess and spreads e evenly over the other K - 1 classes: its entropy
    (scipy.stats.entropy, nats) is the bound."""
    attaining = [1 - error] + [error / (classes - 1)] * (classes - 1)
    assert summaries.fano_bound(error, classes) == pytest.approx(stats.entropy(attaining), rel=1e-12)


def test_fano_bound_tops_out_at_ln_k():
    assert summaries.fano_bound(0.9, 10) == pytest.approx(math.log(10))
    assert summaries.fano_bound(0.95, 10) == pytest.approx(math.log(10))  # past (K-1)/K: no higher


def _simulated(rng, rows, classes, sharpen):
    """Predicted distributions from a Dirichlet, labels drawn from them (so the predictions
    are calibrated by construction), then optionally sharpened: logits times ``sharpen``."""
    p = rng.dirichlet(np.full(classes, 0.3), size=rows)
    y = (rng.random((rows, 1)) > p.cumsum(axis=1)).sum(axis=1).clip(max=classes - 1)
    logits = np.log(p) * sharpen
    q = np.exp(logits - logits.max(axis=1, keepdims=True))
    q /= q.sum(axis=1, keepdims=True)
    return y, q


def test_calibration_rule_on_calibrated_and_overconfident_predictions():
    """Calibrated predictions (labels drawn from the predicted distribution) stay under the
    bound in every one of 200 draws; the same predictions sharpened (logits x 4, a model
    far too sure of itself, with the same argmax and so the same accuracy) exceed it in
    most. Log-loss and accuracy as sklearn.metrics computes them."""
    rng = np.random.default_rng(1)
    calibrated, sharpened = [], []
    for _ in range(200):
        for sharpen, out in ((1.0, calibrated), (4.0, sharpened)):
            y, q = _simulated(rng, 200, 5, sharpen)
            acc = float(np.mean(q.argmax(axis=1) == y))
            ll = log_loss(y, q, labels=range(5))
            out.append(summaries.calibration(acc, ll, 200, 5)["log_loss_ratio"])
    assert max(calibrated) <= 1.0
    assert np.mean(np.array(sharpened) > 1.0) > 0.9
