"""Evaluation metrics by their formulas in numpy, and their goal direction.

sklearn.metrics' input checks cost more than a small network's epoch, so the formulas are
written out here; tests hold every metric equal to sklearn.metrics (accuracy_score,
f1_score(average="macro", zero_division=0), log_loss, mean_squared_error,
mean_absolute_error, r2_score) on the same predictions.
"""

from __future__ import annotations

from enum import Enum
from typing import NamedTuple

import numpy as np

from runner.recipe.constraints import Examples

__all__ = ["EXAMPLES", "METRICS", "Goal", "MetricInfo", "Task", "evaluate", "for_task", "goal", "quick"]


class Task(str, Enum):
    CLASSIFICATION = "classification"
    REGRESSION = "regression"

    def __str__(self) -> str:
        return self.value


class Goal(str, Enum):
    """Which way a metric improves."""

    MAX = "max"
    MIN = "min"

    def __str__(self) -> str:
        return self.value

    def better(self, a: float, b: float) -> bool:
        """Whether ``a`` is strictly better than ``b``."""
        return a > b if self is Goal.MAX else a < b

    @property
    def words(self) -> str:
        return "higher is better" if self is Goal.MAX else "lower is better"


class MetricInfo(NamedTuple):
    task: Task
    goal: Goal


METRICS = {
    "accuracy": MetricInfo(Task.CLASSIFICATION, Goal.MAX),
    "f1_macro": MetricInfo(Task.CLASSIFICATION, Goal.MAX),
    "log_loss": MetricInfo(Task.CLASSIFICATION, Goal.MIN),
    "mae": MetricInfo(Task.REGRESSION, Goal.MIN),
    "r2": MetricInfo(Task.REGRESSION, Goal.MAX),
    "rmse": MetricInfo(Task.REGRESSION, Goal.MIN),
}

# Worked examples, walked by tests/test_components.py.
EXAMPLES = {
    "accuracy": Examples(
        valid=({"rank_by": "val.accuracy"},),
        invalid=(({"rank_by": "test.accuracy"}, "ranking on the test split is refused"),),
    ),
    "f1_macro": Examples(valid=({"rank_by": "val.f1_macro"},)),
    "log_loss": Examples(
        valid=({"rank_by": "val.log_loss"},),
        invalid=(({"rank_by": "val.rmse"}, "rmse is not a classification metric"),),
    ),
    "mae": Examples(valid=({"rank_by": "val.mae", "data": {"source": "diabetes"}},)),
    "r2": Examples(valid=({"rank_by": "val.r2", "data": {"source": "diabetes"}},)),
    "rmse": Examples(
        valid=({"rank_by": "val.rmse", "data": {"source": "diabetes"}},),
        invalid=(({"rank_by": "val.rsme", "data": {"source": "diabetes"}}, 'Did you mean "val.rmse"?'),),
    ),
}


def goal(metric: str) -> Goal:
    return METRICS[metric].goal


def for_task(task: str) -> list[str]:
    return sorted(m for m, info in METRICS.items() if info.task == task)


def evaluate(task: str, y_true: np.ndarray, output: np.ndarray, n_classes: int = 0) -> dict[str, float]:
    """All metrics of the task. ``output`` is class probabilities (N, K) or predictions (N,)."""
    return {m: quick(m, y_true, output, n_classes) for m in for_task(task)}


def quick(metric: str, y_true: np.ndarray, output: np.ndarray, n_classes: int = 0) -> float:
    """One metric of class probabilities (N, K) or predictions (N,)."""
    if metric == "accuracy":
        return float(np.mean(output.argmax(axis=1) == y_true))
    if metric == "f1_macro":  # per class 2 TP / (predicted + true), 0 where both are empty
        pred = output.argmax(axis=1)
        cm = np.bincount(y_true * n_classes + pred, minlength=n_classes * n_classes).reshape(n_classes, n_classes)
        tp = np.diag(cm).astype(float)
        denom = cm.sum(axis=0) + cm.sum(axis=1)
        f1 = np.divide(2 * tp, denom, out=np.zeros(n_classes), where=denom > 0)
        return float(f1.mean())
    if metric == "log_loss":  # clipped to [eps, 1 - eps] with the dtype's machine eps, as sklearn does
        eps = np.finfo(output.dtype).eps
        probs = np.clip(output[np.arange(len(y_true)), y_true], eps, 1 - eps)
        return float(-np.mean(np.log(probs)))
    err = y_true - output
    if metric == "rmse":
        return float(np.sqrt(np.mean(err**2)))
    if metric == "mae":
        return float(np.mean(np.abs(err)))
    if metric == "r2":  # constant targets: 1 for a perfect fit, else 0 (sklearn's force_finite)
        total = np.sum((y_true - y_true.mean()) ** 2)
        residual = np.sum(err**2)
        if total == 0:
            return 1.0 if residual == 0 else 0.0
        return float(1 - residual / total)
    raise KeyError(metric)
