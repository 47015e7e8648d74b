"""Which rows of a dataset each split of a seed holds, and the scaling fitted on rows.

A bundle (outputs/bundle.py) records the scaler fitted on its job's training rows, and
``recipe predict`` marks which input rows were the job's train, val and test rows; a refit
(training/replay.py) fits its scaler on train+val. ``split_rows`` reads the rows from
splits.split_rows, the function every job's split comes from, and ``fit_scaler`` uses
split_and_scale's formulas in its order of rows, so the statistics are the same bits.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from runner.datasets import splits
from runner.datasets.sources import Dataset

if TYPE_CHECKING:
    from runner.recipe.settings import DataSettings

__all__ = ["SPLIT_NAMES", "apply_scaler", "fit_scaler", "split_rows"]

SPLIT_NAMES = ("train", "val", "test")
_EXACT_ROWS = 2**24  # float32 holds every whole number up to this exactly


def split_rows(ds: Dataset, data: DataSettings, seed: int, fold: int | None = None) -> dict[str, np.ndarray]:
    """Row numbers (0-based, in the split's own order) of each split of this seed (and fold)."""
    rows = splits.split_rows(ds, data, seed, fold)
    out = {"train": rows.train, "val": rows.val}
    if rows.test is not None:
        out["test"] = rows.test
    return {k: np.asarray(v, dtype=np.int64) for k, v in out.items()}


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
