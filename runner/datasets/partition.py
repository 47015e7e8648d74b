"""Random train/held-out partitions of row indices, drawn exactly as scikit-learn draws them.

``shuffle_split`` and ``stratified_shuffle_split`` give the same indices, in the same order,
as the first split of sklearn.model_selection.ShuffleSplit and StratifiedShuffleSplit with
``test_size`` a fraction and ``random_state`` an integer (tests/test_partition.py compares
them with scikit-learn over many sizes, shares, class mixes and seeds): every job's split,
and so every stored number, stays what it was. Written out because importing
sklearn.model_selection (which imports scipy) costs as much as importing torch, in every
process that trains, for a few lines of numpy.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["shuffle_split", "stratified_shuffle_split"]


def _sizes(n: int, share: float) -> tuple[int, int]:
    """(kept, held out) row counts: the held-out share rounded up, as scikit-learn does."""
    held = math.ceil(share * n)
    if n - held <= 0:
        raise ValueError(
            f"With n_samples={n}, test_size={share} and train_size=None, the resulting train set will be "
            "empty. Adjust any of the aforementioned parameters."
        )
    return n - held, held


def shuffle_split(n: int, share: float, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """(kept, held out) indices of ``n`` rows: ShuffleSplit(1, test_size=share, random_state=seed)."""
    kept, held = _sizes(n, share)
    order = np.random.RandomState(seed).permutation(n)
    return order[held : held + kept], order[:held]


def _approximate_mode(counts: np.ndarray, draws: int, rng: np.random.RandomState) -> np.ndarray:
    """How many of ``draws`` rows each class gets: its share rounded down, then one more to
    the largest remainders, ties broken at random (scikit-learn's rule and draws)."""
    continuous = counts / counts.sum() * draws
    floored = np.floor(continuous)
    need = int(draws - floored.sum())
    if need > 0:
        remainder = continuous - floored
        for value in np.sort(np.unique(remainder))[::-1]:
            (tied,) = np.where(remainder == value)
            now = min(len(tied), need)
            floored[rng.choice(tied, size=now, replace=False)] += 1
            need -= now
            if need == 0:
                break
    return floored.astype(int)


def stratified_shuffle_split(y: np.ndarray, share: float, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """(kept, held out) indices keeping each class's share of ``y`` in both parts:
    StratifiedShuffleSplit(1, test_size=share, random_state=seed)."""
    kept, held = _sizes(len(y), share)
    classes, index, counts = np.unique(y, return_inverse=True, return_counts=True)
    if np.min(counts) < 2:
        raise ValueError(
            "The least populated classes in y have only 1 member, which is too few. The minimum number of "
            f"groups for any class cannot be less than 2. Classes with too few members are: "
            f"{classes[counts < 2].tolist()}"
        )
    for name, size in (("train_size", kept), ("test_size", held)):
        if size < len(classes):
            raise ValueError(
                f"The {name} = {size} should be greater or equal to the number of classes = {len(classes)}"
            )
    by_class = np.split(np.argsort(index, kind="stable"), np.cumsum(counts)[:-1])
    rng = np.random.RandomState(seed)
    n_kept = _approximate_mode(counts, kept, rng)
    n_held = _approximate_mode(counts - n_kept, held, rng)
    train: list = []
    test: list = []
    for i in range(len(classes)):
        rows = by_class[i].take(rng.permutation(counts[i]), mode="clip")
        train.extend(rows[: n_kept[i]])
        test.extend(rows[n_kept[i] : n_kept[i] + n_held[i]])
    return rng.permutation(train), rng.permutation(test)
