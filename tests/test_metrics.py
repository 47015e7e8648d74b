"""metrics: equal to sklearn.metrics on the same predictions."""

import numpy as np
import pytest
from sklearn import metrics as skm

from runner.components.metrics import evaluate, quick


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
def test_formulas_equal_sklearn(seed):
    """metrics.quick computes the same numbers as sklearn.metrics, with classes 3..6."""
    from runner.components.metrics import quick

    rng = np.random.default_rng(seed)
    k = 3 + seed
    y = rng.integers(0, k, 150)
    y[:k] = np.arange(k)
    probs = rng.dirichlet(np.ones(k), 150)
    pred = probs.argmax(1)
    full = {
        "accuracy": skm.accuracy_score(y, pred),
        "f1_macro": skm.f1_score(y, pred, average="macro", labels=np.arange(k), zero_division=0),
        "log_loss": skm.log_loss(y, probs, labels=np.arange(k)),
    }
    for name in ("accuracy", "f1_macro", "log_loss"):
        assert quick(name, y, probs, k) == pytest.approx(full[name], rel=1e-12, abs=1e-15)
    t = rng.normal(100, 30, 80)
    pred = t + rng.normal(0, 10, 80)
    full = {
        "rmse": np.sqrt(skm.mean_squared_error(t, pred)),
        "mae": skm.mean_absolute_error(t, pred),
        "r2": skm.r2_score(t, pred),
    }
    for name in ("rmse", "mae", "r2"):
        assert quick(name, t, pred) == pytest.approx(full[name], rel=1e-12)


def test_quick_f1_with_a_class_never_predicted():
    """A class absent from the predictions scores F1 0, as sklearn's zero_division=0 does."""
    from runner.components.metrics import quick

    y = np.array([0, 1, 2, 2, 1, 0])
    probs = np.eye(3)[[0, 1, 1, 1, 1, 0]]
    assert quick("f1_macro", y, probs, 3) == pytest.approx(
        skm.f1_score(y, probs.argmax(1), average="macro", zero_division=0)
    )


@pytest.mark.parametrize("pred", [np.full(5, 3.0), np.array([3.0, 3, 3, 3, 4])])
def test_r2_of_constant_targets_as_sklearn(pred):
    y = np.full(5, 3.0)
    assert quick_r2(y, pred) == skm.r2_score(y, pred)


def test_bundled_wine_logistic_regression_metrics_match_sklearn():
    """Real probabilities: a logistic regression on scikit-learn's bundled wine data."""
    from sklearn.datasets import load_wine
    from sklearn.linear_model import LogisticRegression
    from sklearn.preprocessing import StandardScaler

    X, y = load_wine(return_X_y=True)
    X = StandardScaler().fit_transform(X)
    probs = LogisticRegression(C=0.05, max_iter=500).fit(X[::2], y[::2]).predict_proba(X[1::2])
    yt = y[1::2]
    out = evaluate("classification", yt, probs, 3)
    assert out["accuracy"] == skm.accuracy_score(yt, probs.argmax(1))
    assert out["f1_macro"] == pytest.approx(skm.f1_score(yt, probs.argmax(1), average="macro"), rel=1e-12)
    assert out["log_loss"] == pytest.approx(skm.log_loss(yt, probs), rel=1e-12)


def quick_r2(y, pred):
    from runner.components.metrics import quick

    return quick("r2", y, pred)


def test_log_loss_clips_like_sklearn_on_confident_mistakes():
    """A probability of exactly 0 on the true class is clipped at the dtype's machine eps and
    not renormalized, as sklearn.metrics.log_loss does (the audit found 0.2006 stored against
    sklearn's 0.2048 on a real job, from a 1e-15 clip with renormalization)."""
    rng = np.random.default_rng(3)
    probs = rng.dirichlet(np.ones(3), size=200)
    y = rng.integers(0, 3, size=200)
    probs[:5] = 0.0
    probs[np.arange(5), (y[:5] + 1) % 3] = 1.0  # five confident mistakes
    ours = quick("log_loss", y, probs, 3)
    assert ours == pytest.approx(skm.log_loss(y, probs, labels=[0, 1, 2]), rel=1e-12)
