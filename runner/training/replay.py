"""Training a stored job again: bit for bit as it first trained (``retrain``), or once more
on train+val for a chosen number of epochs (``refit``).

A job trained on its own is retrained on its own; a stacked member's last bits depend on
the group it trained in, so its whole group (recorded in the store, keys in order) is
trained again and its member taken. Both run in this process through the serial executor,
with the thread count the job ran with and deterministic kernels, the conditions under
which the same job gives the same bits on the same machine.
"""

from __future__ import annotations

import contextlib
import dataclasses
import statistics
import time
from dataclasses import dataclass

import numpy as np

from runner.datasets import splits
from runner.datasets.splits import Splits
from runner.errors import UserError
from runner.recipe.grid import Grid, Job
from runner.recipe.settings import Settings
from runner.store.database import Store
from runner.training.job import JobResult, JobSpec, Status

__all__ = ["Refit", "Retrained", "refit", "refit_epochs", "retrain"]


@dataclass(frozen=True)
class Retrained:
    result: JobResult
    group: tuple[str, ...]  # the stacked group retrained with it, () alone
    reproduced: bool  # every stored final metric came out the same number


def _spec_for(key: str, job: Job, grid: Grid, store: Store) -> JobSpec:
    """A group member's spec: from the grid when it is there, else from its stored settings."""
    for other in grid:
        if other.key == key:
            return other.spec(keep_weights=True)
    stored = store.settings_of(key)
    if stored is None:
        raise UserError(
            "cannot retrain this job as it trained: a member of its stacked group is no longer stored",
            key=job.key,
            value=key,
            hint="Export another seed, or use --refit",
        )
    settings, seed = stored
    return JobSpec(key, seed, Settings.from_dict(settings), job.monitor, job.config.data_id, keep_weights=True)


def _threads(store: Store, key: str) -> int:
    rows = store.jobs([key])
    return int(rows[0].env.get("threads", 1)) if rows else 1


def retrain(job: Job, grid: Grid, store: Store) -> Retrained:
    """Train ``job`` again the way it trained and return its result with its weights."""
    from runner.execution.executors import SerialExecutor
    from runner.training.grouping import Stacked

    group = store.trained_as(job.key)
    if group is None:
        raise UserError(
            "the store does not record how this job trained (it was stored by an older version)",
            key=job.key,
            hint="Run the recipe with --fresh to store it anew, or use --refit",
        )
    item = Stacked(_spec_for(k, job, grid, store) for k in group) if group else (job.spec(keep_weights=True),)
    results: dict[str, JobResult] = {}
    SerialExecutor(_threads(store, job.key)).run([item], grid.datasets, lambda s, r, _a: results.setdefault(s.key, r))
    result = results[job.key]
    stored = store.metrics().get(job.key, {})
    reproduced = result.status is Status.DONE and all(
        result.metrics.get(split, {}).get(name) == value
        for split, values in stored.items()
        for name, value in values.items()
        if value is not None
    )
    return Retrained(result=result, group=tuple(group), reproduced=reproduced)


def refit_epochs(jobs: list[Job], store: Store) -> int:
    """Epochs for a refit: the median over the configuration's done seeds of the epoch early
    stopping chose (all epochs when it was off), rounded half up."""
    stored = {r.key: r for r in store.jobs([j.key for j in jobs])}
    chosen = [r.best_epoch for r in stored.values() if r.status is Status.DONE and r.best_epoch]
    if not chosen:
        raise UserError("no done seed of this configuration to take the epoch count from", key="--refit")
    return max(1, int(np.floor(statistics.median(chosen) + 0.5)))


@dataclass(frozen=True)
class Refit:
    result: JobResult
    splits: Splits  # train = the seed's train+val rows, encoded and scaled on them (its preprocessing)
    epochs: int


def _merged(job: Job, grid: Grid) -> Splits:
    """The seed's train and val rows as one training split, encoded and scaled on them; val
    kept for the loop's per-epoch curve only (early stopping is off); test as it was."""
    ds = grid.datasets[job.config.data_id]
    data = job.config.settings.data
    rows = splits.split_rows(ds, data, job.seed, job.fold)
    merged = splits.SplitRows(np.concatenate([rows.train, rows.val]), rows.val, rows.test)
    return splits.prepare_rows(ds, data, merged)


@contextlib.contextmanager
def _deterministic(threads: int):
    """The serial executor's process set-up (thread count, deterministic kernels) around a
    refit, with the previous thread limits restored after."""
    import threadpoolctl
    import torch

    from runner.execution.executors import prepare_process

    previous = torch.get_num_threads()
    blas = threadpoolctl.threadpool_limits(None)  # remembers the current limits
    prepare_process(threads)
    try:
        yield
    finally:
        torch.set_num_threads(previous)
        blas.restore_original_limits()


def refit(job: Job, grid: Grid, epochs: int, threads: int = 1) -> Refit:
    """Train ``job``'s configuration with its seed once more on its train+val rows for
    ``epochs`` epochs (early stopping off), on its own; returns it with its weights."""
    from runner.training.environment import environment
    from runner.training.loop import new_members, train_members
    from runner.training.single import SingleBackend

    ds = grid.datasets[job.config.data_id]
    settings = job.config.settings.with_train(epochs=epochs, patience=0, time_limit=0.0, checkpoint_every=0)
    spec = dataclasses.replace(job.spec(keep_weights=True), settings=settings)
    sp = _merged(job, grid)
    with _deterministic(threads):
        start = time.perf_counter()
        backend = SingleBackend(spec, ds, splits=sp)
        result = train_members(backend, new_members([spec], environment()), start)[0]
    return Refit(result=result, splits=sp, epochs=epochs)
