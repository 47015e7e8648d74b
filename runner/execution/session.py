"""What `recipe run` and the Python API's ``run`` train once the plan is made.

``Training.run(todo, progress_for, note)`` trains a grid's unfinished jobs on the executor
their work items pay for (execution/sizing.py), or, for an adaptive recipe, its race round
by round (execution/racing.py), each round on the executor its own items pay for. An
explicit worker count or a cluster overrides the choice. A cluster's executor is made with
the Training, so a scheduler that cannot be reached is refused before anything trains;
`dask-local` starts its LocalCluster each time the executor runs (once per race round).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from runner.errors import UserError
from runner.execution.planning import execute, executor_for, work_items
from runner.execution.progress import Progress
from runner.recipe.grid import Grid, Job
from runner.store import Store

__all__ = ["Training", "check_retry"]


def check_retry(grid: Grid, retry_failed: bool) -> None:
    """Refuse --retry-failed (``retry_failed=True`` in the API) on an adaptive recipe: its
    race has already looked at those jobs' results and decided on them."""
    if retry_failed and grid.recipe.adaptive is not None:
        raise UserError(
            "--retry-failed cannot be used with [adaptive]: the race has already decided on those jobs",
            key="--retry-failed",
            hint="Start the race over with --fresh, or run without [adaptive]",
        )


class Training:
    tracker: Any = None  # outputs.mlflow_export.RunLogger: told of every stored job, if set

    def __init__(
        self,
        grid: Grid,
        store: Store,
        on: str | None = None,
        workers: int | None = None,
        threads: int = 1,
        max_attempts: int = 2,
        time_limit: float | None = None,
        stack: bool = True,
    ):
        """``on`` and ``workers`` as given (--on, --workers), else the recipe's [run] table;
        no worker count anywhere leaves it to the plan (sizing.py)."""
        self.grid, self.store = grid, store
        run = grid.recipe.run
        self.where, self.asked, self.threads = on or run.on, workers or run.workers or None, threads
        self.max_attempts, self.time_limit, self.stack = max_attempts, time_limit, stack
        self.keep = run.keep_weights != "none"
        self.cluster = None
        if self.where != "local":
            self.cluster = self._executor([])

    def _executor(self, items: list):
        if self.cluster is not None:
            return self.cluster
        return executor_for(self.where, items, self.grid, self.asked, self.threads, self.max_attempts,
                            self.time_limit)  # fmt: skip

    def _stored(self):
        return None if self.tracker is None else self.tracker.stored

    def run(
        self,
        todo: list[Job],
        progress_for: Callable[[int], Progress | None],
        note: Callable[[str], None] | None = None,
    ) -> None:
        """Train ``todo`` (the plan's jobs to run); ``progress_for(n)`` makes the progress of
        n jobs (a race makes one per round), ``note`` prints a race's lines."""
        if not todo:
            return
        if self.grid.recipe.adaptive is not None:
            from runner.execution.racing import run_race

            run_race(self.grid, self.store, self._executor, progress_for, self.time_limit, self._stored(), self.stack,
                     note, self.keep)  # fmt: skip
            return
        items = work_items(self.grid, self.store, todo, self.stack, self.time_limit, self.keep)
        execute(self.grid, self.store, todo, self._executor(items), progress_for(len(todo)), self.time_limit,
                on_stored=self._stored(), keep_weights=self.keep, items=items)  # fmt: skip
