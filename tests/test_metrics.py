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
