"""Evaluation metrics, computed with sklearn.metrics, and their goal direction."""
from __future__ import annotations

import numpy as np
from sklearn import metrics as skm

__all__ = ["METRICS", "goal", "evaluate", "quick"]

# metric -> (task, goal)
METRICS = {
    "accuracy": ("classification", "max"),
    "f1_macro": ("classification", "max"),
    "log_loss": ("classification", "min"),
    "mae": ("regression", "min"),
    "r2": ("regression", "max"),
    "rmse": ("regression", "min"),
}


def goal(metric: str) -> str:
    return METRICS[metric][1]


def for_task(task: str) -> list[str]:
    return sorted(m for m, (t, _) in METRICS.items() if t == task)


def evaluate(task: str, y_true: np.ndarray, output: np.ndarray, n_classes: int = 0) -> dict[str, float]:
    """All metrics of the task. ``output`` is class probabilities (N, K) or predictions (N,)."""
    if task == "classification":
        pred = output.argmax(axis=1)
        probs = np.clip(output, 1e-15, 1.0)
        probs = probs / probs.sum(axis=1, keepdims=True)
        return {
            "accuracy": float(skm.accuracy_score(y_true, pred)),
            "f1_macro": float(skm.f1_score(y_true, pred, average="macro",
                                           labels=np.arange(n_classes), zero_division=0)),
            "log_loss": float(skm.log_loss(y_true, probs, labels=np.arange(n_classes))),
        }
    return {
        "rmse": float(np.sqrt(skm.mean_squared_error(y_true, output))),
        "mae": float(skm.mean_absolute_error(y_true, output)),
        "r2": float(skm.r2_score(y_true, output)),
    }


def quick(metric: str, y_true: np.ndarray, output: np.ndarray, n_classes: int = 0) -> float:
    """One metric by its formula in numpy, for the per-epoch curves (sklearn's input checks
    cost more than a small network's epoch). Tests hold it equal to sklearn.metrics; final
    metrics always come from ``evaluate``."""
    if metric == "accuracy":
        return float(np.mean(output.argmax(axis=1) == y_true))
    if metric == "f1_macro":
        pred = output.argmax(axis=1)
        cm = np.bincount(y_true * n_classes + pred, minlength=n_classes * n_classes).reshape(n_classes, n_classes)
        tp = np.diag(cm).astype(float)
        denom = cm.sum(axis=0) + cm.sum(axis=1)
        f1 = np.divide(2 * tp, denom, out=np.zeros(n_classes), where=denom > 0)
        return float(f1.mean())
    if metric == "log_loss":
        probs = np.clip(output, 1e-15, 1.0)
        probs = probs / probs.sum(axis=1, keepdims=True)
        return float(-np.mean(np.log(probs[np.arange(len(y_true)), y_true])))
    err = y_true - output
    if metric == "rmse":
        return float(np.sqrt(np.mean(err ** 2)))
    if metric == "mae":
        return float(np.mean(np.abs(err)))
    if metric == "r2":
        total = np.sum((y_true - y_true.mean()) ** 2)
        return float(1 - np.sum(err ** 2) / total) if total > 0 else 0.0
    raise KeyError(metric)
