"""Which rows of a dataset each split of a seed holds, and the scaling fitted on rows.

A bundle (outputs/bundle.py) records the scaler fitted on its job's training rows, and
``recipe predict`` marks which input rows were the job's train, val and test rows; a refit
(training/replay.py) fits its scaler on train+val. Both come from ``split_and_scale``
itself, so they follow it whatever it does: ``split_rows`` asks it to split the row numbers
(the split depends on the row count, the targets and the seed, never on feature values),
and ``fit_scaler`` uses its formulas in its order of rows, so the statistics are the same
bits. When splits.Splits carries its rows and fitted preprocessing itself, both reduce to
reading them.
"""

from __future__ import annotations

import dataclasses
from typing import TYPE_CHECKING

import numpy as np

from runner.datasets.sources import Dataset
from runner.datasets.splits import split_and_scale

if TYPE_CHECKING:
    from runner.recipe.settings import DataSettings

__all__ = ["SPLIT_NAMES", "apply_scaler", "fit_scaler", "split_rows"]

SPLIT_NAMES = ("train", "val", "test")
_EXACT_ROWS = 2**24  # float32 holds every whole number up to this exactly


def split_rows(ds: Dataset, data: DataSettings, seed: int) -> dict[str, np.ndarray]:
    """Row numbers (0-based, in the split's own order) of each split of this seed."""
    n = len(ds.y)
    if n > _EXACT_ROWS:
        raise ValueError(f"{n} rows: more than float32 row numbers can name exactly")
    numbers = np.arange(n, dtype=np.float32).reshape(n, 1)
    index = dataclasses.replace(ds, X=numbers, feature_names=("row",))
    sp = split_and_scale(index, dataclasses.replace(data, scale="none"), seed)
    out = {"train": sp.X_train[:, 0], "val": sp.X_val[:, 0]}
    if sp.X_test is not None:
        out["test"] = sp.X_test[:, 0]
    return {k: v.astype(np.int64) for k, v in out.items()}


def fit_scaler(X: np.ndarray, kind: str) -> tuple[np.ndarray, np.ndarray]:
    """(subtract, divide by) per column of ``X`` (rows, features), float32: "standard" the
    mean and standard deviation (ddof 0; constant columns keep 1), "minmax" the minimum and
    range, "none" 0 and 1. The formulas of splits.split_and_scale."""
    mean = np.zeros(X.shape[1], np.float32)
    scale = np.ones(X.shape[1], np.float32)
    if kind == "standard":
        mean = X.mean(axis=0)
        std = X.std(axis=0)
        scale = np.where(std > 0, std, 1.0).astype(np.float32)
    elif kind == "minmax":
        lo, hi = X.min(axis=0), X.max(axis=0)
        mean, scale = lo, np.where(hi > lo, hi - lo, 1.0).astype(np.float32)
    return np.asarray(mean, np.float32), scale


def apply_scaler(X: np.ndarray, mean: np.ndarray, scale: np.ndarray) -> np.ndarray:
    """``X`` (rows, ...) scaled column by column over its flattened features, float32."""
    flat = X.reshape(len(X), -1).astype(np.float32, copy=False)
    return ((flat - mean) / scale).astype(np.float32).reshape(X.shape)
