"""Run a grid's unfinished jobs into the store: the step between grid and summary.

Finished jobs (done, diverged, failed, timed out) are skipped, so running a recipe again
resumes it; ``retry_failed`` reruns the failed and timed-out ones. Only one runner uses a
store at a time (store.RunnerLock); a second one refuses with a clear message.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from runner.execution.progress import Progress
from runner.recipe.grid import Grid, Job
from runner.store import RunnerLock, Store
from runner.training.job import FINISHED, Status

__all__ = ["Plan", "checkpoint_dir", "execute", "forget", "make_executor", "plan"]


@dataclass(frozen=True)
class Plan:
    total: int
    done: int
    to_run: list[Job]

    def describe(self) -> str:
        return f"{self.total} jobs, {self.done} done, {len(self.to_run)} to run"


def plan(grid: Grid, store: Store, retry_failed: bool = False) -> Plan:
    finished = store.finished_keys((Status.DONE, Status.DIVERGED) if retry_failed else FINISHED)
    jobs = list(grid)
    todo = [j for j in jobs if j.key not in finished]
    return Plan(total=len(jobs), done=len(jobs) - len(todo), to_run=todo)


def checkpoint_dir(store: Store) -> Path:
    return store.path.with_suffix(".checkpoints")


def forget(grid: Grid, store: Store) -> int:
    """Delete this grid's stored results and checkpoints (``recipe run --fresh``)."""
    keys = [j.key for j in grid]
    removed = store.forget(keys)
    from runner.training import checkpoints as checkpoint  # torch: imported only where a run needs it

    for key in keys:
        checkpoint.remove(str(checkpoint_dir(store) / f"{key}.pt"))
    return removed


def make_executor(on: str, workers: int, threads: int = 1, max_attempts: int = 2, hard_limit: float | None = None):
    """``on``: "local" (worker processes, or in-process with one worker), "dask-local" (a
    LocalCluster on loopback) or "dask://HOST:PORT" (an existing scheduler)."""
    from runner.execution.executors import PoolExecutor, SerialExecutor

    if on == "local":
        if workers <= 1:
            return SerialExecutor(threads)
        return PoolExecutor(workers, threads, max_attempts, hard_limit)
    from runner.execution.dask_cluster import DaskExecutor

    return DaskExecutor(on, workers, threads, max_attempts)


def execute(
    grid: Grid,
    store: Store,
    todo: list[Job],
    executor,
    progress: Progress | None = None,
    time_limit: float | None = None,
    on_stored=None,
    stack: bool = True,
) -> None:
    """Run ``todo``; each result is committed to the store as soon as it arrives. With
    ``stack``, same-shaped jobs train together as one stacked computation (training/stacked.py)."""
    from runner.training import checkpoints as checkpoint
    from runner.training.grouping import group_specs, training_note

    if not todo:
        return
    by_key = {j.key: j for j in todo}
    split, metric = grid.rank_by.split(".", 1)
    ckpt_dir = checkpoint_dir(store)

    def on_start(spec):
        store.mark_running(spec.key)

    def on_result(spec, result, attempts):
        job = by_key[spec.key]
        labels = grid.labels(job.config)
        store.write_result(job, labels, grid.recipe.hash, result, attempts)
        checkpoint.remove(spec.checkpoint)  # the result is safe: its checkpoint is not needed
        if progress is not None:
            for note in result.notes:
                progress.warn(note)
            value = result.metrics.get(split, {}).get(metric)
            label = ", ".join(labels.values()) or "base"
            progress.update(label, job.seed, result.status, value, result.duration, result.error)
        if on_stored is not None:
            on_stored(job, result)

    def spec_of(j):
        ckpt = ckpt_dir / f"{j.key}.pt" if j.config.settings.train.checkpoint_every else None
        return j.spec(checkpoint=str(ckpt) if ckpt else None, time_limit=time_limit)

    # Groups are formed from what is left to run: a stacked member's numbers do not depend on
    # its group (grouping.group_specs), so a resumed or extended grid trains only its missing jobs.
    items = group_specs([spec_of(j) for j in todo], grid.datasets, enabled=stack)
    if progress is not None:
        progress.note(training_note(items))
    with RunnerLock(store):
        store.remember_recipe(grid.recipe)
        try:
            executor.run(items, grid.datasets, on_result, on_start)
        finally:
            if progress is not None:
                progress.close()
