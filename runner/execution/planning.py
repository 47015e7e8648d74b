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

__all__ = ["Plan", "checkpoint_dir", "execute", "executor_for", "forget", "make_executor", "plan", "work_items"]


@dataclass(frozen=True)
class Plan:
    total: int
    done: int
    to_run: list[Job]

    def summary_line(self) -> str:
        return f"{self.total} jobs, {self.done} done, {len(self.to_run)} to run"


def plan(grid: Grid, store: Store, retry_failed: bool = False) -> Plan:
    finished = store.finished_keys((Status.DONE, Status.DIVERGED) if retry_failed else FINISHED)
    jobs = list(grid)
    todo = [j for j in jobs if j.key not in finished]
    return Plan(total=len(jobs), done=len(jobs) - len(todo), to_run=todo)


def item_keys(item) -> tuple[str, ...]:
    return tuple(spec.key for spec in item)


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


def executor_for(
    on: str,
    items: list,
    grid: Grid,
    workers: int | None,
    threads: int = 1,
    max_attempts: int = 2,
    hard_limit: float | None = None,
):
    """The executor for these work items: ``workers`` as asked (1: in this process), or when
    not asked, locally, as many worker processes as pay for themselves (sizing.py; none,
    training here, for a small plan, unless a hard time limit needs a process to kill)."""
    from runner.execution.forkserver import default_workers

    if on != "local" or workers is not None:
        return make_executor(on, workers or default_workers(), threads, max_attempts, hard_limit)
    from runner.execution.sizing import choose_workers

    chosen = choose_workers(items, grid.datasets, default_workers())
    if chosen == 1 and hard_limit:
        from runner.execution.executors import PoolExecutor

        return PoolExecutor(1, threads, max_attempts, hard_limit)
    return make_executor(on, chosen, threads, max_attempts, hard_limit)


def work_items(
    grid: Grid,
    store: Store,
    todo: list[Job],
    stack: bool = True,
    time_limit: float | None = None,
    keep_weights: bool = True,
):
    """What the executor runs: ``todo`` as work items, stacked groups of same-shaped jobs
    (training/stacked.py) or single jobs. Groups are formed from what is left to run: a
    stacked member's numbers do not depend on its group (grouping.group_specs), so a resumed
    or extended grid trains only its missing jobs; groups long enough to lose much to a
    Ctrl-C are cut (sizing.cut_long_groups)."""
    from runner.execution.sizing import cut_long_groups
    from runner.training.grouping import group_specs

    ckpt_dir = checkpoint_dir(store)

    def spec_of(j):
        ckpt = ckpt_dir / f"{j.key}.pt" if j.config.settings.train.checkpoint_every else None
        return j.spec(checkpoint=str(ckpt) if ckpt else None, time_limit=time_limit, keep_weights=keep_weights)

    return cut_long_groups(group_specs([spec_of(j) for j in todo], grid.datasets, enabled=stack), grid.datasets)


def execute(
    grid: Grid,
    store: Store,
    todo: list[Job],
    executor,
    progress: Progress | None = None,
    time_limit: float | None = None,
    on_stored=None,
    stack: bool = True,
    keep_weights: bool = True,
    items: list | None = None,
) -> None:
    """Run ``todo`` (as ``items``, or as work_items makes them); each result is committed to
    the store as soon as it arrives. With ``keep_weights``, each done job's trained weights
    come back with its result and are stored beside it, in the same transaction."""
    from runner.training.grouping import training_note
    from runner.training.weights import encode

    if not todo:
        return
    by_key = {j.key: j for j in todo}
    split, metric = grid.rank_by.split(".", 1)

    def on_start(spec):
        store.mark_running(spec.key)

    def on_result(spec, result, attempts):
        job = by_key[spec.key]
        labels = grid.labels(job.config)
        blob = encode(result.weights) if result.weights is not None else None
        store.write_result(job, labels, grid.recipe.hash, result, attempts, weights=blob)
        if spec.checkpoint:  # the result is safe: its checkpoint is not needed
            from runner.training import checkpoints  # torch: only for jobs that keep checkpoints

            checkpoints.remove(spec.checkpoint)
        if progress is not None:
            for note in result.notes:
                progress.warn(note)
            value = result.metrics.get(split, {}).get(metric)
            label = ", ".join(labels.values()) or "base"
            progress.update(label, job.seed, result.status, value, result.duration, result.error, key=spec.key)
        if on_stored is not None:
            on_stored(job, result)

    if items is None:
        items = work_items(grid, store, todo, stack, time_limit, keep_weights)
    if progress is not None:
        where = getattr(executor, "where", None)
        progress.note(training_note(items) + (f" {where(items)}" if where else ""))
    with RunnerLock(store):
        store.remember_recipe(grid.recipe)
        try:
            on_progress = None if progress is None else (lambda item, share: progress.advance(item_keys(item), share))
            executor.run(items, grid.datasets, on_result, on_start, on_progress)
        finally:
            if progress is not None:
                progress.close()
