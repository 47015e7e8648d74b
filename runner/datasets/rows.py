"""Which rows of a dataset each split of a seed holds, and scaling rows as a bundle records.

``recipe predict`` marks which input rows were the job's train, val and test rows:
``split_rows`` reads them from splits.split_rows, the function every job's split comes
from. ``apply_scaler`` scales raw rows with a bundle's recorded statistics (fitted by
splits.prepare_rows on the rows the network trained on).
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from runner.datasets import splits
from runner.datasets.sources import Dataset

if TYPE_CHECKING:
    from runner.recipe.settings import DataSettings

__all__ = ["SPLIT_NAMES", "apply_scaler", "split_rows"]

SPLIT_NAMES = ("train", "val", "test")
_EXACT_ROWS = 2**24  # float32 holds every whole number up to this exactly


def split_rows(ds: Dataset, data: DataSettings, seed: int, fold: int | None = None) -> dict[str, np.ndarray]:
    """Row numbers (0-based, in the split's own order) of each split of this seed (and fold)."""
    rows = splits.split_rows(ds, data, seed, fold)
    out = {"train": rows.train, "val": rows.val}
    if rows.test is not None:
        out["test"] = rows.test
    return {k: np.asarray(v, dtype=np.int64) for k, v in out.items()}


def apply_scaler(X: np.ndarray, mean: np.ndarray, scale: np.ndarray) -> np.ndarray:
    """``X`` (rows, ...) scaled column by column over its flattened features, float32."""
    flat = X.reshape(len(X), -1).astype(np.float32, copy=False)
    return ((flat - mean) / scale).astype(np.float32).reshape(X.shape)
