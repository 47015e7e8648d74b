"""`recipe run` on an adaptive recipe: the race's rounds (evidence/race.py decides, this runs).

Each pass: the race's state from the store (its stored looks, then the looks the finished
jobs allow); new looks are stored before anything else trains, so a killed run resumes in
the round it stopped in and decides nothing twice; then the jobs the round still needs are
trained through ``planning.execute``. Stacked groups are formed over the round's own jobs
(every configuration still racing x the round's seeds), whatever is left of them to run, so
a resumed round forms the groups an uninterrupted one forms and gives the same numbers.
Each round gets the executor its own work items pay for (``executor_for``): a race's first
round may want workers, its last rounds of a few jobs train in this process.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from runner.errors import UserError
from runner.evidence.race import RaceState
from runner.evidence.race_board import current, race_plan
from runner.execution.planning import execute, work_items
from runner.execution.progress import Progress
from runner.recipe.grid import Grid, Job
from runner.store import Store

__all__ = ["run_race", "summary_line"]


class _RoundGrid:
    """The grid as ``execute`` sees it for one round: the same grid, whose jobs are the
    round's jobs only (the set stacked groups are formed over)."""

    def __init__(self, grid: Grid, jobs: list[Job]):
        self._grid = grid
        self._jobs = jobs

    def __getattr__(self, name: str):
        return getattr(self._grid, name)

    def __iter__(self):
        return iter(self._jobs)

    def __len__(self) -> int:
        return len(self._jobs)


def _state(grid: Grid, store: Store) -> RaceState:
    from runner.evidence.leaderboard import protocol_of

    state = current(grid, store, protocol_of(grid, store.jobs({j.key for j in grid})))
    assert state is not None  # only adaptive recipes race
    return state


def summary_line(grid: Grid, store: Store) -> str:
    """What `recipe run` says before an adaptive run starts."""
    state = _state(grid, store)
    plan = state.plan
    head = (f"adaptive seeding: {len(plan.configs)} configurations, {len(plan.seeds)} seeds at most "
            f"({plan.full_jobs} jobs in the full grid), {plan.first_seeds} seeds in round 1")  # fmt: skip
    if state.finished:
        return f"{head}; the race has ended ({state.stop}): 0 to run"
    return f"{head}; now in round {state.round} with {len(state.alive)} configurations"


def _round_jobs(grid: Grid, state: RaceState, finished: set[str]) -> tuple[list[Job], list[Job]]:
    """(the round's jobs, those of them without a stored result)."""
    seeds = set(state.plan.round_seeds(state.round))
    alive = set(state.alive)
    jobs = [j for j in grid if j.config.id in alive and j.seed in seeds]
    return jobs, [j for j in jobs if j.key not in finished]


def run_race(
    grid: Grid,
    store: Store,
    executor_for: Callable[[list], Any],
    progress_for: Callable[[int], Progress | None],
    time_limit: float | None = None,
    on_stored=None,
    stack: bool = True,
    note: Callable[[str], None] | None = None,
    keep_weights: bool = True,
) -> RaceState:
    """Run the race to its end; ``executor_for(items)`` gives the executor for a round's work
    items, ``progress_for(n)`` makes the progress of a round of n jobs, ``note`` prints a
    line per look."""
    plan = race_plan(grid)
    assert plan is not None
    key = plan.key()
    recorded = len(store.race_looks(key))
    last_todo: set[str] | None = None
    while True:
        state = _state(grid, store)
        for lk in state.looks[recorded:]:
            store.record_race_look(key, lk.round, lk.to_record())
            if note is not None:
                dropped = sum(not d.kept for d in lk.decisions)
                end = f"; the race ends: {lk.stop}" if lk.stop else ""
                note(f"look after round {lk.round} ({lk.seeds} seeds): {dropped} of {len(lk.decisions)} "
                     f"configurations dropped{end}")  # fmt: skip
        recorded = len(state.looks)
        if state.finished:
            return state
        jobs, todo = _round_jobs(grid, state, store.finished_keys())
        keys = {j.key for j in todo}
        if not todo or keys == last_todo:  # the executor returned without finishing them
            raise UserError(
                f"round {state.round} of the race did not finish its jobs",
                hint="Run the same command again; stored jobs are not repeated",
            )
        last_todo = keys
        if note is not None:
            note(f"round {state.round}: {len(state.alive)} configurations, {len(todo)} jobs to run")
        round_grid = _RoundGrid(grid, jobs)
        items = work_items(round_grid, store, todo, stack, time_limit, keep_weights)  # type: ignore[arg-type]
        execute(round_grid, store, todo, executor_for(items), progress_for(len(todo)), time_limit, on_stored,  # type: ignore[arg-type]
                stack, keep_weights, items)  # fmt: skip
