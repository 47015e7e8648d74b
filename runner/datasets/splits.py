"""One seed's train/val/test split of a dataset, with scaling fitted on the training rows."""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from runner.components.metrics import Task
from runner.datasets.sources import Dataset
from runner.errors import DataError

if TYPE_CHECKING:
    from runner.recipe.settings import DataSettings

__all__ = ["Splits", "split_and_scale"]


@dataclass(frozen=True)
class Splits:
    X_train: np.ndarray
    y_train: np.ndarray
    X_val: np.ndarray
    y_val: np.ndarray
    X_test: np.ndarray | None
    y_test: np.ndarray | None
    y_mean: float = 0.0  # regression: targets are standardized for training
    y_std: float = 1.0
    scaler_mean: np.ndarray | None = None


def _split_off(idx: np.ndarray, share: float, seed: int, strat: np.ndarray | None):
    """(kept, split off) rows of ``idx``: exactly sklearn's train_test_split(idx,
    test_size=share, random_state=seed, stratify=strat), drawn as its splitters draw
    (partition.py; without importing scikit-learn, which costs as much as torch)."""
    from runner.datasets.partition import shuffle_split, stratified_shuffle_split

    kept, off = shuffle_split(len(idx), share, seed) if strat is None else stratified_shuffle_split(strat, share, seed)
    return idx[kept], idx[off]


def split_and_scale(ds: Dataset, data: DataSettings, seed: int) -> Splits:
    """One seed's split. Scaling statistics come from the training rows only."""
    split = data.split
    idx = np.arange(len(ds.y))
    strat = ds.y if (split.stratify and ds.task is Task.CLASSIFICATION) else None
    test_idx = None
    try:
        if split.test > 0:
            idx, test_idx = _split_off(idx, split.test, seed, strat)
            strat = ds.y[idx] if strat is not None else None
        val_share = split.val / (1.0 - split.test)
        train_idx, val_idx = _split_off(idx, val_share, seed, strat)
    except ValueError as exc:
        raise DataError(
            f"cannot split the data as asked ({exc})",
            key="data.split",
            hint="Use larger val/test fractions or stratify = false",
        ) from None
    X = ds.X.reshape(len(ds.X), -1)
    mean = np.zeros(X.shape[1], np.float32)
    scale = np.ones(X.shape[1], np.float32)
    if data.scale == "standard":
        mean = X[train_idx].mean(axis=0)
        std = X[train_idx].std(axis=0)
        scale = np.where(std > 0, std, 1.0).astype(np.float32)  # constant columns keep scale 1
    elif data.scale == "minmax":
        lo, hi = X[train_idx].min(axis=0), X[train_idx].max(axis=0)
        mean, scale = lo, np.where(hi > lo, hi - lo, 1.0).astype(np.float32)
    Xs = ((X - mean) / scale).astype(np.float32).reshape(ds.X.shape)
    y = ds.y
    y_mean, y_std = 0.0, 1.0
    if ds.task is Task.REGRESSION:
        y_mean = float(y[train_idx].mean())
        y_std = float(y[train_idx].std()) or 1.0
    Xte, yte = (Xs[test_idx], y[test_idx]) if test_idx is not None else (None, None)
    return Splits(Xs[train_idx], y[train_idx], Xs[val_idx], y[val_idx], Xte, yte, y_mean, y_std, mean)
