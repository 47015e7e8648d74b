"""partition: train/held-out indices equal scikit-learn's ShuffleSplit and
StratifiedShuffleSplit (the reference) element for element, and fail where they fail."""

import numpy as np
import pytest
from sklearn.model_selection import ShuffleSplit, StratifiedShuffleSplit

from runner.datasets.partition import shuffle_split, stratified_shuffle_split

CASES = [
    (n, share, seed)
    for n in (20, 21, 150, 178, 569, 1797)
    for share in (0.1, 0.2, 0.25, 0.3333)
    for seed in (0, 1, 7, 2147483647)
]


@pytest.mark.parametrize(("n", "share", "seed"), CASES)
def test_shuffle_split_equals_sklearn(n, share, seed):
    ours = shuffle_split(n, share, seed)
    ref = next(ShuffleSplit(n_splits=1, test_size=share, random_state=seed).split(np.arange(n)))
    assert all(np.array_equal(a, b) and a.dtype == b.dtype for a, b in zip(ours, ref))


@pytest.mark.parametrize(("n", "share", "seed"), CASES)
def test_stratified_shuffle_split_equals_sklearn(n, share, seed):
    rng = np.random.default_rng(n + seed)
    for y in (
        rng.integers(0, 3, n),  # about balanced
        np.where(rng.random(n) < 0.15, 1, 0),  # imbalanced
        np.sort(rng.integers(0, 10, n)),  # sorted, ten classes
    ):
        if np.bincount(y).min() < 2:
            continue
        try:
            ref = next(StratifiedShuffleSplit(n_splits=1, test_size=share, random_state=seed).split(np.arange(n), y))
        except ValueError as exc:
            with pytest.raises(ValueError, match=str(exc)[:40]):
                stratified_shuffle_split(y, share, seed)
            continue
        ours = stratified_shuffle_split(y, share, seed)
        assert all(np.array_equal(a, b) and a.dtype == b.dtype for a, b in zip(ours, ref))


def test_impossible_splits_are_refused_as_sklearn_refuses_them():
    y = np.array([0, 0, 0, 0, 1])
    for ours, ref in (
        (lambda: stratified_shuffle_split(y, 0.4, 0), lambda: StratifiedShuffleSplit(1, test_size=0.4).split(y, y)),
        (lambda: shuffle_split(3, 0.9, 0), lambda: ShuffleSplit(1, test_size=0.9).split(np.arange(3))),
    ):
        with pytest.raises(ValueError) as expected:
            next(ref())
        with pytest.raises(ValueError, match=str(expected.value)[:30]):
            ours()
