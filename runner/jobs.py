"""Run a grid's unfinished jobs into the store: the step between grid and summary.

Finished jobs (done, diverged, failed, timed out) are skipped, so running a recipe again
resumes it; ``retry_failed`` reruns the failed and timed-out ones.
"""
from __future__ import annotations

from dataclasses import dataclass

from .grid import Grid, Job
from .progress import Progress
from .schedule import PoolExecutor, SerialExecutor
from .store import FINISHED, Store

__all__ = ["Plan", "plan", "execute"]


@dataclass(frozen=True)
class Plan:
    total: int
    done: int
    to_run: list[Job]

    def describe(self) -> str:
        return f"{self.total} jobs, {self.done} done, {len(self.to_run)} to run"


def plan(grid: Grid, store: Store, retry_failed: bool = False) -> Plan:
    finished = store.finished_keys(("done", "diverged") if retry_failed else FINISHED)
    jobs = list(grid)
    todo = [j for j in jobs if j.key not in finished]
    return Plan(total=len(jobs), done=len(jobs) - len(todo), to_run=todo)


def execute(grid: Grid, store: Store, todo: list[Job], workers: int, threads: int = 1,
            progress: Progress | None = None) -> None:
    """Run ``todo``; each result is committed to the store as soon as it arrives."""
    if not todo:
        return
    store.remember_recipe(grid.recipe)
    by_key = {j.key: j for j in todo}
    split, metric = grid.rank_by.split(".", 1)

    def on_result(spec, result, attempts):
        job = by_key[spec.key]
        labels = grid.labels(job.config)
        store.write_result(job, labels, grid.recipe.hash, result, attempts)
        if progress is not None:
            value = result.metrics.get(split, {}).get(metric)
            label = ", ".join(labels.values()) or "base"
            progress.update(label, job.seed, result.status, value, result.duration)

    specs = [j.spec() for j in todo]
    executor = SerialExecutor(threads) if workers <= 1 else PoolExecutor(min(workers, len(specs)), threads)
    try:
        executor.run(specs, grid.datasets, on_result)
    finally:
        if progress is not None:
            progress.close()
