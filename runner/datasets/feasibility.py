"""Every split a grid will make, made once before any job trains.

A split that cannot be made (a class with one row under stratification, too few rows for
train, val and test, a column with no value in some training split) would otherwise fail
every job that uses it, at run time. ``check_grid_splits`` runs the very function the jobs
run (``split_and_scale``) for each distinct dataset, data settings and seed, and turns the
first failure into one error naming the setting, the seed, and what would work.
"""

from __future__ import annotations

import dataclasses
from collections import Counter
from typing import TYPE_CHECKING

import numpy as np

from runner.components.metrics import Task
from runner.datasets.sources import Dataset
from runner.datasets.splits import split_and_scale
from runner.errors import DataError

if TYPE_CHECKING:
    from runner.recipe.grid import Grid
    from runner.recipe.settings import DataSettings

__all__ = ["check_grid_splits", "check_splits"]


def check_grid_splits(grid: Grid) -> None:
    """Raise a DataError (located in the recipe) for the first split the grid cannot make."""
    done: set[tuple] = set()
    for config in grid.configs:
        data = config.settings.data
        ds = grid.datasets[config.data_id]
        key = (config.data_id, data)
        if key in done:
            continue
        done.add(key)
        try:
            check_splits(ds, data, grid.recipe.seeds)
        except DataError as err:
            labels = grid.labels(config)
            if labels and len(grid.configs) > 1:
                which = ", ".join(f"{k} = {v}" for k, v in labels.items())
                err.hint = (err.hint + "; " if err.hint else "") + f"in the configuration {which}"
            recipe = grid.recipe
            line = recipe.line_of(err.key) if err.key and err.key.startswith("data.") else None
            raise err.located(where=recipe.path.name, line=line) from None


def check_splits(ds: Dataset, data: DataSettings, seeds) -> None:
    """Make every seed's split of ``ds`` as the jobs will; raise for the first that fails."""
    # Only a layout's encodings look at feature values; otherwise one column stands in for
    # X, so checking many seeds of a large dataset costs only the row draws.
    proxy = ds
    if ds.layout is None:
        proxy = ds.replaced(X=np.zeros((len(ds.y), 1), np.float32), feature_names=("x",))
    folds = range(data.split.folds) if data.split.validation == "folds" else [None]
    for seed, fold in ((s, f) for s in seeds for f in folds):
        try:
            sp = split_and_scale(proxy, data, seed, fold)
        except DataError as err:
            if err.key == "data.split":
                raise _explain(ds, data, seed) from None
            err.problem += f" (seed {seed})"
            err.args = (err.message(),)
            raise
        _check_training_rows(ds, data, seed, sp.y_train)


def _check_training_rows(ds: Dataset, data: DataSettings, seed: int, y_train: np.ndarray) -> None:
    """A split that can be made may still leave nothing to learn from."""
    split = data.split
    asked = f"val = {split.val}, test = {split.test}"
    if len(y_train) < 2:
        raise DataError(
            f"with {len(ds.y)} rows, the training split of seed {seed} ({asked}) would have {len(y_train)} row",
            key="data.split",
            hint="Add rows (a study needs far more than a handful), or set test = 0",
        )
    if ds.task is Task.CLASSIFICATION and len(np.unique(y_train)) < 2:
        only = ds.classes[int(y_train[0])]
        raise DataError(
            f'the training split of seed {seed} ({asked}) would hold only class "{only}": nothing to learn',
            key="data.split",
            hint="Add rows of the other classes, or stratify = true",
        )


def _explain(ds: Dataset, data: DataSettings, seed: int) -> DataError:
    split = data.split
    n = len(ds.y)
    asked = f"val = {split.val}, test = {split.test}, stratify = {'true' if split.stratify else 'false'}"
    stratified = split.stratify and ds.task is Task.CLASSIFICATION
    if stratified:
        counts = Counter(ds.y.tolist())
        label, fewest = min(counts.items(), key=lambda kv: (kv[1], kv[0]))
        unstratified = dataclasses.replace(data, split=dataclasses.replace(split, stratify=False))
        works = _works(ds, unstratified, seed)
        parts = f"train, val{' and test' if split.test > 0 else ''}"
        if fewest < (3 if split.test > 0 else 2):
            why = f'class "{ds.classes[label]}" has {fewest} row{"s" if fewest != 1 else ""}'
        else:
            why = f"some split would have fewer rows than the {len(counts)} classes"
        problem = (
            f"cannot split {n} rows as asked ({asked}) for seed {seed}: {why}, "
            f"and a stratified split puts every class in {parts}"
        )
        hint = (
            "stratify = false splits these rows; or drop or merge the rare class, or add rows"
            if works
            else "Add rows, or drop or merge the rare class"
        )
        return DataError(problem, key="data.split", hint=hint)
    return DataError(
        f"cannot split {n} rows as asked ({asked}) for seed {seed}: train, val"
        f"{' and test' if split.test > 0 else ''} each need at least one row",
        key="data.split",
        hint="Add rows (a study needs far more than a handful), or set test = 0",
    )


def _works(ds: Dataset, data: DataSettings, seed: int) -> bool:
    try:
        split_and_scale(ds.replaced(X=np.zeros((len(ds.y), 1), np.float32), layout=None), data, seed)
    except DataError:
        return False
    return True
