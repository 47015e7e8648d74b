"""One job's train/val/test split of a dataset, with scaling fitted on the training rows.

The protocol (data.split): the test rows are drawn once per recipe with ``test_seed`` and are
the same rows for every job, so the test score beside a chosen configuration was never used
to choose it. The remaining rows are split into train and validation by the seed
(``resample``), once with ``test_seed`` (``fixed``), or into stratified folds reshuffled by
the seed (``folds``, one job per fold).
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from runner.components.metrics import Task
from runner.datasets.encoding import Preprocessing, describe_preprocessing, encode_split
from runner.datasets.sources import Dataset
from runner.errors import DataError

if TYPE_CHECKING:
    from runner.recipe.settings import DataSettings

__all__ = ["SplitRows", "Splits", "prepare_rows", "split_and_scale", "split_rows"]


@dataclass(frozen=True)
class SplitRows:
    """Which rows of the dataset each part of one job's split holds."""

    train: np.ndarray
    val: np.ndarray
    test: np.ndarray | None

    def record(self) -> dict[str, object]:
        """What a job stores of its split: the sizes (the variance corrections need n_val and
        n_train) and a fingerprint of the test rows (one value across a grid when the test
        split is shared, as it must be)."""
        test = np.sort(self.test) if self.test is not None else np.zeros(0, np.int64)
        digest = hashlib.sha256(np.ascontiguousarray(test, dtype=np.int64).tobytes()).hexdigest()[:16]
        return {"train": len(self.train), "val": len(self.val), "test": len(test), "test_rows": digest}


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
    rows: SplitRows | None = None
    # How the features were made, every statistic from the training rows: what an exported
    # model needs to prepare new rows as these were (encoding.Preprocessing.to_json).
    preprocessing: Preprocessing | None = None


def _split_off(idx: np.ndarray, share: float, seed: int, strat: np.ndarray | None):
    """(kept, split off) rows of ``idx``: exactly sklearn's train_test_split(idx,
    test_size=share, random_state=seed, stratify=strat), drawn as its splitters draw
    (partition.py; without importing scikit-learn, which costs as much as torch)."""
    from runner.datasets.partition import shuffle_split, stratified_shuffle_split

    kept, off = shuffle_split(len(idx), share, seed) if strat is None else stratified_shuffle_split(strat, share, seed)
    return idx[kept], idx[off]


def _folds(idx: np.ndarray, k: int, seed: int, strat: np.ndarray | None, fold: int):
    """(train, val) rows of fold ``fold`` of ``idx`` under sklearn's (Stratified)KFold with
    shuffling by ``seed``: each seed is one repetition of k-fold cross-validation."""
    from sklearn.model_selection import KFold, StratifiedKFold

    splitter = (KFold if strat is None else StratifiedKFold)(n_splits=k, shuffle=True, random_state=seed)
    train, val = list(splitter.split(idx, strat))[fold]
    return idx[train], idx[val]


def split_rows(ds: Dataset, data: DataSettings, seed: int, fold: int | None = None) -> SplitRows:
    """The rows of one job's split (see the module docstring for the protocol)."""
    split = data.split
    idx = np.arange(len(ds.y))
    strat = ds.y if (split.stratify and ds.task is Task.CLASSIFICATION) else None
    test_idx = None
    try:
        if split.test > 0:
            idx, test_idx = _split_off(idx, split.test, split.test_seed, strat)
        rest_strat = ds.y[idx] if strat is not None else None
        if split.validation == "folds":  # the non-test rows in dataset order, then shuffled folds
            rest = np.sort(idx)
            train_idx, val_idx = _folds(rest, split.folds, seed, ds.y[rest] if strat is not None else None, fold or 0)
        else:
            draw = seed if split.validation == "resample" else split.test_seed
            train_idx, val_idx = _split_off(idx, split.val / (1.0 - split.test), draw, rest_strat)
    except ValueError as exc:
        raise DataError(
            f"cannot split the data as asked ({exc})",
            key="data.split",
            hint="Use larger val/test fractions, fewer folds or stratify = false",
        ) from None
    return SplitRows(train_idx, val_idx, test_idx)


def split_and_scale(ds: Dataset, data: DataSettings, seed: int, fold: int | None = None) -> Splits:
    """One job's split. Scaling statistics come from the training rows only."""
    return prepare_rows(ds, data, split_rows(ds, data, seed, fold))


def prepare_rows(ds: Dataset, data: DataSettings, rows: SplitRows) -> Splits:
    """The features of ``rows`` encoded and scaled with statistics of ``rows.train`` only
    (a refit passes train+val as its training rows)."""
    train_idx, val_idx, test_idx = rows.train, rows.val, rows.test
    X, encodings = encode_split(ds.X.reshape(len(ds.X), -1), ds.layout, train_idx, ds.label)
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
    pre = describe_preprocessing(ds.feature_names, encodings, ds.layout, data.scale, mean, scale, ds.image_shape)
    return Splits(Xs[train_idx], y[train_idx], Xs[val_idx], y[val_idx], Xte, yte, y_mean, y_std, mean, rows, pre)
