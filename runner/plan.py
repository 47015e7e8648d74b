"""`recipe check`: the expanded plan, what the store already holds, and a run-time estimate
from a short timed probe of one job."""
from __future__ import annotations

import dataclasses
import time

from .grid import Grid
from .store import Store

__all__ = ["describe_plan", "probe_seconds_per_epoch", "PROBE_EPOCHS"]

PROBE_EPOCHS = 2


def probe_seconds_per_epoch(grid: Grid, job) -> float:
    """Train ``job`` for PROBE_EPOCHS epochs in this process, one thread; seconds per epoch."""
    from .schedule import prepare_process
    from .train import run_job

    spec = job.spec()
    settings = {s: dict(v) for s, v in spec.settings.items()}
    epochs = min(PROBE_EPOCHS, settings["train"]["epochs"])
    settings["train"].update(epochs=epochs, patience=0, checkpoint_every=0, time_limit=0.0)
    spec = dataclasses.replace(spec, settings=settings, checkpoint=None)
    prepare_process(1, grid.datasets)
    start = time.perf_counter()
    result = run_job(spec, grid.datasets[spec.data_id])
    elapsed = time.perf_counter() - start
    return elapsed / max(1, result.epochs_run or epochs)


def describe_plan(grid: Grid, store: Store | None, workers: int, probe: bool = True) -> tuple[str, dict]:
    recipe = grid.recipe
    jobs = list(grid)
    statuses = {}
    if store is not None:
        statuses = {r["key"]: r["status"] for r in store.jobs({j.key for j in jobs})}
    counts = {s: 0 for s in ("done", "diverged", "failed", "timeout")}
    for status in statuses.values():
        counts[status] += 1
    todo = [j for j in jobs if j.key not in statuses]
    lines = [f"{recipe.name}: {recipe.description}" if recipe.description else recipe.name,
             f"ranked by {grid.rank_by} ({'higher' if grid.goal == 'max' else 'lower'} is better); "
             f"task {grid.task}; seeds {', '.join(map(str, recipe.seeds))}"]
    if recipe.factors:
        lines.append("factors:")
        for f in recipe.factors:
            levels = ", ".join(f.label(i) + (" (baseline)" if recipe.baseline[f.name] == i else "")
                               for i in range(len(f.levels)))
            paths = "" if f.paths == (f.name,) else f" [{', '.join(f.paths)}]"
            lines.append(f"  {f.name}{paths}: {levels}")
    if recipe.exclude:
        lines.append(f"exclusions: {len(recipe.exclude)} rule(s)")
    lines.append(f"{len(grid.configs)} configurations x {len(recipe.seeds)} seeds = {len(jobs)} jobs: "
                 f"{counts['done']} done, {counts['diverged']} diverged, {counts['failed']} failed, "
                 f"{counts['timeout']} timed out, {len(todo)} to run")
    info = {"configurations": len(grid.configs), "jobs": len(jobs), **counts, "to_run": len(todo),
            "estimate_seconds": None}
    if probe and todo:
        per_epoch = probe_seconds_per_epoch(grid, todo[0])
        total_epochs = sum(j.config.settings["train"]["epochs"] for j in todo)
        estimate = per_epoch * total_epochs / max(1, min(workers, len(todo)))
        info["estimate_seconds"] = estimate
        lines.append(f"estimated run time: about {_human(estimate)} with {workers} worker(s) "
                     f"(an estimate from a {PROBE_EPOCHS}-epoch probe of one job; configurations differ in "
                     "cost, and early stopping or divergence can end jobs sooner)")
    return "\n".join(lines) + "\n", info


def _human(seconds: float) -> str:
    if seconds < 90:
        return f"{seconds:.0f} s"
    if seconds < 5400:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"
