"""metrics: equal to sklearn.metrics on the same predictions."""
import numpy as np
import pytest
from sklearn import metrics as skm

from runner.metrics import evaluate


def test_classification_metrics_match_sklearn():
    rng = np.random.default_rng(0)
    y = rng.integers(0, 3, 200)
    logits = rng.normal(size=(200, 3)) + np.eye(3)[y] * 1.5
    probs = np.exp(logits) / np.exp(logits).sum(1, keepdims=True)
    out = evaluate("classification", y, probs, 3)
    assert out["accuracy"] == skm.accuracy_score(y, probs.argmax(1))
    assert out["f1_macro"] == pytest.approx(skm.f1_score(y, probs.argmax(1), average="macro"))
    assert out["log_loss"] == pytest.approx(skm.log_loss(y, probs), rel=1e-9)


def test_uniform_probabilities_give_log_k():
    """Uniform predictions over K classes have cross-entropy ln K (2.302585 for K = 10)."""
    y = np.arange(100) % 10
    out = evaluate("classification", y, np.full((100, 10), 0.1), 10)
    assert out["log_loss"] == pytest.approx(2.302585, abs=1e-6)


def test_regression_metrics_match_sklearn():
    rng = np.random.default_rng(1)
    y = rng.normal(150, 50, 100)
    pred = y + rng.normal(0, 20, 100)
    out = evaluate("regression", y, pred)
    assert out["rmse"] == pytest.approx(np.sqrt(skm.mean_squared_error(y, pred)))
    assert out["mae"] == pytest.approx(skm.mean_absolute_error(y, pred))
    assert out["r2"] == pytest.approx(skm.r2_score(y, pred))


@pytest.mark.parametrize("seed", range(4))
def test_quick_per_epoch_metrics_equal_sklearn(seed):
    """metrics.quick (the per-epoch curves) computes the same numbers as sklearn.metrics."""
    from runner.metrics import quick

    rng = np.random.default_rng(seed)
    k = 3 + seed
    y = rng.integers(0, k, 150)
    y[:k] = np.arange(k)
    probs = rng.dirichlet(np.ones(k), 150)
    full = evaluate("classification", y, probs, k)
    for name in ("accuracy", "f1_macro", "log_loss"):
        assert quick(name, y, probs, k) == pytest.approx(full[name], rel=1e-12, abs=1e-15)
    t = rng.normal(100, 30, 80)
    pred = t + rng.normal(0, 10, 80)
    full = evaluate("regression", t, pred)
    for name in ("rmse", "mae", "r2"):
        assert quick(name, t, pred) == pytest.approx(full[name], rel=1e-12)


def test_quick_f1_with_a_class_never_predicted():
    """A class absent from the predictions scores F1 0, as sklearn's zero_division=0 does."""
    from runner.metrics import quick

    y = np.array([0, 1, 2, 2, 1, 0])
    probs = np.eye(3)[[0, 1, 1, 1, 1, 0]]
    assert quick("f1_macro", y, probs, 3) == pytest.approx(evaluate("classification", y, probs, 3)["f1_macro"])
