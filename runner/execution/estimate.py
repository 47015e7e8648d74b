"""`recipe check`: the expanded plan, what the store already holds, and a run-time estimate
from short timed probes of the work `recipe run` would do."""

from __future__ import annotations

import dataclasses
import heapq
import time

from runner.recipe.grid import Grid, canonical
from runner.store.database import Store
from runner.training.job import Status

__all__ = [
    "MAX_PROBES",
    "PROBE_EPOCHS",
    "deal",
    "estimate_seconds",
    "item_costs",
    "plan_report",
    "probe_rates",
    "work_items",
]

PROBE_EPOCHS = 2
MAX_PROBES = 6  # distinct kinds of work item timed; others are costed from these


def _probe_item(item, epochs: int = PROBE_EPOCHS) -> tuple:
    """The item with every member cut to ``epochs`` epochs and nothing that outlives it
    (no early stopping, checkpoints or time limit), of the same type (stacked or single)."""
    from runner.training.grouping import Stacked

    specs = []
    for spec in item:
        settings = spec.settings.with_train(
            epochs=min(epochs, spec.settings.train.epochs), patience=0, checkpoint_every=0, time_limit=0.0
        )
        specs.append(dataclasses.replace(spec, settings=settings, checkpoint=None, time_limit=None))
    return Stacked(specs) if isinstance(item, Stacked) else tuple(specs)


def _kind(item) -> str:
    """Work items of one kind cost the same per member and epoch: a stacked group's shapes
    (its stack key), or a single job's model, batch size and data."""
    from runner.training.grouping import Stacked, stack_key

    spec = item[0]
    if isinstance(item, Stacked):
        return "stacked " + stack_key(spec)
    return canonical({"model": spec.settings.model, "bs": spec.settings.train.batch_size, "data": spec.data_id})


def _seconds_per_member_epoch(item, grid: Grid) -> float:
    from runner.execution.executors import ready_for
    from runner.training.loop import train_item

    ready_for(item)
    train_item(_probe_item(item, epochs=1), grid.datasets)  # untimed: this kind's one-off costs
    probe = _probe_item(item)  # (imports, first calls of its kernels, pages of code read from disk)
    start = time.perf_counter()
    results = train_item(probe, grid.datasets)
    elapsed = time.perf_counter() - start
    epochs = max(1, max((r.epochs_run or 0) for r in results))
    return elapsed / epochs / len(probe)


def work_items(grid: Grid, todo: list, stack: bool = True) -> list[tuple]:
    """The work items `recipe run` would make of ``todo``: stacked groups formed as
    execute() forms them (from the jobs to run, long groups cut), one job at a time otherwise."""
    from runner.execution.sizing import cut_long_groups
    from runner.training.grouping import group_specs

    return cut_long_groups(group_specs([j.spec() for j in todo], grid.datasets, enabled=stack), grid.datasets)


def probe_rates(items: list[tuple], grid: Grid) -> dict[str, float]:
    """Seconds per member and epoch of each kind of work item (up to MAX_PROBES kinds),
    from a PROBE_EPOCHS-epoch probe of one item of the kind, in this process."""
    from runner.execution.executors import prepare_process

    prepare_process(1, grid.datasets)
    rates: dict[str, float] = {}
    for item in items:
        kind = _kind(item)
        if kind not in rates and len(rates) < MAX_PROBES:
            rates[kind] = _seconds_per_member_epoch(item, grid)
    return rates


def item_costs(items: list[tuple], rates: dict[str, float]) -> list[float]:
    """Each item's seconds: its kind's rate times its members and epochs (kinds not probed
    get the mean of the probed kinds)."""
    fallback = sum(rates.values()) / len(rates)
    return [rates.get(_kind(it), fallback) * len(it) * max(s.settings.train.epochs for s in it) for it in items]


def deal(costs: list[float], workers: int) -> float:
    """The finishing time of items dealt to ``workers`` longest first, each to the least
    loaded worker (the longest-processing-time rule)."""
    loads = [0.0] * max(1, min(workers, len(costs)))
    for cost in sorted(costs, reverse=True):
        heapq.heapreplace(loads, loads[0] + cost)
    return max(loads)


def estimate_seconds(grid: Grid, todo: list, workers: int, stack: bool = True) -> float:
    """Seconds of training for ``todo`` on ``workers`` processes (one thread each): the work
    items `recipe run` would make, costed from short probes and dealt to the workers."""
    items = work_items(grid, todo, stack)
    if not items:
        return 0.0
    return deal(item_costs(items, probe_rates(items, grid)), workers)


def plan_report(
    grid: Grid, store: Store | None, workers: int, probe: bool = True, stack: bool = True
) -> tuple[str, dict]:
    recipe = grid.recipe
    jobs = list(grid)
    statuses = {}
    if store is not None:
        statuses = {r.key: r.status for r in store.jobs({j.key for j in jobs})}
    counts = dict.fromkeys(Status, 0)
    for status in statuses.values():
        counts[status] += 1
    todo = [j for j in jobs if j.key not in statuses]
    lines = [
        f"{recipe.name}: {recipe.description}" if recipe.description else recipe.name,
        f"ranked by {grid.rank_by} ({grid.goal.words}); task {grid.task}; seeds {', '.join(map(str, recipe.seeds))}",
    ]
    if recipe.factors:
        lines.append("factors:")
        for f in recipe.factors:
            levels = ", ".join(
                f.label(i) + (" (baseline)" if recipe.baseline[f.name] == i else "") for i in range(len(f.levels))
            )
            paths = "" if f.paths == (f.name,) else f" [{', '.join(f.paths)}]"
            lines.append(f"  {f.name}{paths}: {levels}")
    if recipe.exclude:
        lines.append(f"exclusions: {len(recipe.exclude)} rule(s)")
    lines.append(
        f"{len(grid.configs)} configurations x {len(recipe.seeds)} seeds = {len(jobs)} jobs: "
        f"{counts[Status.DONE]} done, {counts[Status.DIVERGED]} diverged, {counts[Status.FAILED]} failed, "
        f"{counts[Status.TIMEOUT]} timed out, {len(todo)} to run"
    )
    info = {
        "configurations": len(grid.configs),
        "jobs": len(jobs),
        **{s.value: n for s, n in counts.items()},
        "to_run": len(todo),
        "estimate_seconds": None,
    }
    if probe and todo:
        estimate = estimate_seconds(grid, todo, workers, stack)
        info["estimate_seconds"] = estimate
        how = "stacked as `recipe run` stacks them" if stack else "one job at a time (--no-stack)"
        lines.append(
            f"estimated run time: {_about(estimate)} of training with {workers} worker(s), "
            f"{how}, plus a few seconds to start the workers (from {PROBE_EPOCHS}-epoch probes; "
            "early stopping or divergence can end jobs sooner)"
        )
    return "\n".join(lines) + "\n", info


def _about(seconds: float) -> str:
    text = _human(seconds)
    return text if text.startswith("under") else "about " + text


def _human(seconds: float) -> str:
    if seconds < 1:
        return "under a second"
    if seconds < 90:
        return f"{seconds:.0f} s"
    if seconds < 5400:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"
