"""Evaluation metrics, computed with sklearn.metrics, and their goal direction."""
from __future__ import annotations

import numpy as np
from sklearn import metrics as skm

__all__ = ["METRICS", "goal", "evaluate"]

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
