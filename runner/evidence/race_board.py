"""An adaptive run on the board: the race's plan from a grid, its state from the store, and
what the board shows of it (each configuration's seeds, the round it was dropped in and why,
the verdicts of the looks, a caution).

The looks a run stored are read back as they were decided; looks the finished jobs allow but
no run has stored yet (a board read mid-run, or settings changed since) are made here in
memory by the same rule (race.advance), never written: read-only commands do not write.
"""

from __future__ import annotations

import dataclasses
from typing import TYPE_CHECKING, Any

from runner.components.metrics import METRICS
from runner.errors import RecipeError
from runner.evidence.document import Counts, RaceEntry, Row, Verdict
from runner.evidence.race import Look, RacePlan, RaceState, advance
from runner.evidence.verdicts import Assessment
from runner.training.job import Status

if TYPE_CHECKING:
    from runner.evidence.protocols import Resampling
    from runner.recipe.grid import Grid
    from runner.store.database import Store

__all__ = ["caution", "current", "first_round_grid", "order", "race_assessment", "race_doc", "race_plan", "with_race"]


def race_plan(grid: Grid) -> RacePlan | None:
    """The race of an adaptive recipe (None without [adaptive]), on the recipe's own rank
    metric; a job budget smaller than the first round is a RecipeError."""
    adaptive = grid.recipe.adaptive
    if adaptive is None:
        return None
    split = grid.configs[0].settings.data.split
    plan = RacePlan(
        configs=tuple(c.id for c in grid.configs), seeds=tuple(grid.recipe.seeds), first_seeds=adaptive.first_seeds,
        metric=f"val.{grid.monitor}", goal=str(METRICS[grid.monitor].goal), alpha=grid.recipe.verdicts.alpha,
        margin=grid.recipe.verdicts.margin, max_jobs=adaptive.max_jobs,
        folds=split.folds if split.validation == "folds" else None,
    )  # fmt: skip
    first = len(plan.configs) * plan.first_seeds * plan.jobs_per_seed
    if plan.max_jobs and plan.max_jobs < first:
        raise RecipeError(
            f"is below the first round's {first} jobs ({len(plan.configs)} configurations x "
            f"{plan.first_seeds} seeds{f' x {plan.folds} folds' if plan.folds else ''})",
            key="adaptive.max_jobs",
            value=plan.max_jobs,
            allowed=f"0 (no budget) or a whole number >= {first}",
            hint="Raise max_jobs, or lower adaptive.first_seeds",
        )
    return plan


def _inputs(grid: Grid, store: Store, metric: str):
    """Per configuration: the done jobs' values of ``metric`` by (seed, fold), and every
    finished (seed, fold) whatever its status."""
    stored = {r.key: r for r in store.jobs({j.key for j in grid})}
    metrics = store.metrics()
    split, name = metric.split(".", 1)
    values: dict[str, dict] = {c.id: {} for c in grid.configs}
    finished: dict[str, set] = {c.id: set() for c in grid.configs}
    for job in grid:
        row = stored.get(job.key)
        if row is None:
            continue
        finished[job.config.id].add((job.seed, job.fold))
        value = metrics.get(job.key, {}).get(split, {}).get(name)
        if row.status is Status.DONE and value is not None:
            values[job.config.id][(job.seed, job.fold)] = value
    return values, finished


def current(grid: Grid, store: Store, protocol: Resampling) -> RaceState | None:
    """The race of ``grid`` as far as the store allows: its stored looks, then the looks the
    finished jobs allow (made in memory)."""
    plan = race_plan(grid)
    if plan is None:
        return None
    values, finished = _inputs(grid, store, plan.metric)
    stored = [Look.from_record(r) for r in store.race_looks(plan.key())]
    return advance(plan, values, finished, protocol, stored)


def first_round_grid(grid: Grid) -> Grid:
    """The grid on the first round's seeds only: the seeds every configuration got before any
    decision, on which the ablation tables stay free of the race's choices."""
    from runner.recipe.grid import Grid as GridType

    seeds = grid.recipe.seeds[: grid.recipe.adaptive.first_seeds] if grid.recipe.adaptive else grid.recipe.seeds
    recipe = dataclasses.replace(grid.recipe, seeds=tuple(seeds))
    return GridType(recipe, grid.configs, grid.datasets, grid.rank_by, grid.task, monitor=grid.monitor)


def _last_decisions(state: RaceState) -> dict[str, tuple[Look, Any]]:
    out = {}
    for lk in state.looks:
        for d in lk.decisions:
            out[d.config_id] = (lk, d)
    return out


def race_assessment(state: RaceState) -> Assessment | None:
    """The board's verdicts from the looks: a dropped configuration keeps the verdict of the
    look that dropped it, one still in the race that of the latest look. None before the
    first look."""
    if not state.looks:
        return None
    verdicts = {}
    for cid, (lk, d) in _last_decisions(state).items():
        if d.advantage is None and not d.kept:
            verdicts[cid] = Verdict("no_verdict", None, None, None, d.reason)
            continue
        kind = ("within_margin" if d.within_margin else "possibly_best") if d.kept else "behind"
        low = None if d.low is None else min(0.0, d.low)
        high = None if d.high is None else max(0.0, d.high)
        reason = f"{lk.basis or 'race'}; look after round {lk.round} ({lk.seeds} seeds, level {lk.alpha:.3g})"
        verdicts[cid] = Verdict(kind, d.advantage, low, high, reason)
    last = state.looks[-1]
    units = state.plan.units(state.plan.seeds_after(last.round))
    return Assessment(verdicts, units, f"{last.basis or 'race'} (racing: each look at alpha/{state.plan.looks})", None)


def with_race(rows: list[Row], state: RaceState) -> list[Row]:
    """Rows with their race entries; a job the race will not train is counted as skipped,
    not pending."""
    out = []
    for row in rows:
        dropped = state.dropped_at(row.config_id)
        if dropped is not None:
            decision = next(d for d in dropped.decisions if d.config_id == row.config_id)
            entry = RaceEntry(dropped.seeds, dropped.round, decision.reason)
        else:
            entry = RaceEntry(state.seeds_given(row.config_id), None, state.stop or "racing")
        counts = row.counts
        if dropped is not None or state.finished:
            counts = dataclasses.replace(counts, pending=0, skipped=counts.skipped + counts.pending)
        out.append(dataclasses.replace(row, race=entry, counts=counts))
    return out


def order(state: RaceState) -> dict[str, int]:
    """Sort key of each configuration: those still in the race first, then the dropped ones,
    later drops before earlier ones."""
    last = len(state.looks) + 1
    return {c: last - lk.round for c in state.plan.configs if (lk := state.dropped_at(c)) is not None}


def race_doc(state: RaceState, labels: dict[str, str], trained: Counts) -> dict[str, Any]:
    """The JSON ``race`` entry: plan, rounds (who raced, who was dropped), why it ended."""
    plan = state.plan
    rounds = [{"round": lk.round, "seeds": lk.seeds, "racing": len(lk.decisions),
               "dropped": [labels[d.config_id] for d in lk.decisions if not d.kept], "stop": lk.stop,
               "critical": lk.critical, "half_width": lk.half_width}
              for lk in state.looks]  # fmt: skip
    return {"metric": plan.metric, "first_seeds": list(plan.seeds[: plan.first_seeds]), "looks_planned": plan.looks,
            "alpha": plan.alpha, "alpha_look": plan.alpha_look, "margin": plan.margin or None,
            "max_jobs": plan.max_jobs or None, "jobs_finished": trained.finished, "jobs_full_grid": plan.full_jobs,
            "rounds": rounds, "finished": state.finished, "stop": state.stop}  # fmt: skip


def caution(state: RaceState, labels: dict[str, str], trained: Counts, rank_by: str) -> list[str]:
    plan = state.plan
    out = [f"Adaptive seeding (racing; Maron & Moore 1994, Birattari et al. 2002): {trained.finished} of the full "
           f"grid's {plan.full_jobs} jobs finished. After each round a configuration shown behind the best "
           f"(Hsu 1996's comparisons with the best, level {plan.alpha:g}/{plan.looks} = {plan.alpha_look:.3g} per "
           f"look, the constant for all {len(plan.configs)} configurations) got no more seeds, so a truly best "
           f"configuration is dropped or left out with probability at most {plan.alpha:g} over all "
           f"{plan.looks} planned looks (Bonferroni)."]  # fmt: skip
    for lk in state.looks:
        gone = [labels[d.config_id] for d in lk.decisions if not d.kept]
        if gone:
            out.append(f"Dropped after round {lk.round} ({lk.seeds} seeds): {'; '.join(gone)}.")
    out.append(f"The race ended: {state.stop}." if state.finished else
               f"The race is in round {state.round}: run the recipe again to go on.")  # fmt: skip
    out.append("The ablation tables and the diff use the first round's seeds "
               f"({', '.join(map(str, plan.seeds[: plan.first_seeds]))}), which every configuration got before any "
               "decision.")  # fmt: skip
    if rank_by != plan.metric:
        out.append(f"The race was decided on {plan.metric}; the verdicts on {rank_by} use the seeds every "
                   "configuration shares.")  # fmt: skip
    return out
