"""Ablation tables: what each factor does, measured over matched configurations and seeds.

- Main effects: for each level of a factor, its mean over the other factors' levels (per
  seed, then a t interval over seeds), and the difference to the factor's baseline level,
  paired over matched configurations (same levels of the other factors, same seed): matched
  differences are averaged within each seed, then a paired t interval is taken over seeds.
- One factor at a time (when the recipe names a [baseline]): the baseline configuration
  against the configurations that change exactly one factor from it, paired by seed.
- Interactions: for each pair of factors, the two-way table of means and whether the best
  level of the first depends on the level of the second.
- Regularization and optimization views for factors that touch those settings.
"""

from __future__ import annotations

import itertools
import statistics
from collections import defaultdict

from runner.components.metrics import Goal
from runner.evidence import stats
from runner.evidence.document import (
    Ablation,
    Interaction,
    LevelEffect,
    MainEffect,
    MatchedDifference,
    OneAtATime,
    OneAtATimeRow,
    OptimizationRow,
    RegularizationRow,
)
from runner.recipe.grid import Grid
from runner.store.database import Store
from runner.training.job import Status

__all__ = ["OPTIMIZATION_PATHS", "REGULARIZATION_PATHS", "ablation"]

REGULARIZATION_PATHS = {
    "train.l1",
    "train.l2",
    "train.l1_mode",
    "train.weight_decay",
    "train.patience",
    "model.dropout",
    "model.input_dropout",
    "model.batch_norm",
}
OPTIMIZATION_PATHS = {
    "train.optimizer",
    "train.lr",
    "train.momentum",
    "train.beta1",
    "train.beta2",
    "train.alpha",
    "train.eps",
    "train.schedule",
    "train.batch_size",
    "train.clip_norm",
}
REACH = 0.95  # "epochs to reach 95% of the configuration's best val metric"


class _Table:
    """Per-job facts keyed by (levels tuple, seed) for the grid's finished jobs."""

    def __init__(self, grid: Grid, store: Store, with_curves: bool):
        split, self.metric = grid.rank_by.split(".", 1)
        self.goal = grid.goal
        stored = {r.key: r for r in store.jobs({j.key for j in grid})}
        metrics = store.metrics()
        self.value, self.status, self.diag, self.key = {}, {}, {}, {}
        for job in grid:
            row = stored.get(job.key)
            if row is None:
                continue
            cell = (job.config.levels, job.seed)
            self.status[cell] = row.status
            self.key[cell] = job.key
            if row.status is Status.DONE:
                v = metrics.get(job.key, {}).get(split, {}).get(self.metric)
                if v is not None:
                    self.value[cell] = v
                    self.diag[cell] = row.diagnostics
        self.curves = store.curves(self.key.values()) if with_curves else {}
        self.seeds = list(grid.recipe.seeds)


def _per_seed_mean(table: _Table, match) -> dict[int, float]:
    by_seed = defaultdict(list)
    for (levels, seed), v in table.value.items():
        if match(levels):
            by_seed[seed].append(v)
    return {s: statistics.fmean(vs) for s, vs in by_seed.items()}


def _matched_difference(table: _Table, f: int, level: int, base: int) -> MatchedDifference | None:
    """Differences (level - base) over cells equal in every other factor and the seed."""
    per_seed = defaultdict(list)
    for (levels, seed), v in table.value.items():
        if levels[f] != level:
            continue
        twin = levels[:f] + (base,) + levels[f + 1 :]
        if (twin, seed) in table.value:
            per_seed[seed].append(v - table.value[(twin, seed)])
    if not per_seed:
        return None
    seeds = sorted(per_seed)
    means = [statistics.fmean(per_seed[s]) for s in seeds]
    out = stats.paired(means, [0.0] * len(means))
    pairs = sum(len(v) for v in per_seed.values())
    if out is None:
        return MatchedDifference(diff_mean=means[0], ci95=None, p_value=None, n_pairs=pairs, n_seeds=len(seeds))
    return MatchedDifference(
        diff_mean=out["diff_mean"], ci95=out["ci95"], p_value=out["p_value"], n_pairs=pairs, n_seeds=len(seeds)
    )


def _main_effects(grid: Grid, table: _Table) -> list[MainEffect]:
    out = []
    for f, factor in enumerate(grid.recipe.factors):
        base = grid.recipe.baseline[factor.name]
        levels = []
        for i in range(len(factor.levels)):
            per_seed = _per_seed_mean(table, lambda lv, i=i, f=f: lv[f] == i)
            summary = stats.summarize(list(per_seed.values()))
            levels.append(
                LevelEffect(
                    label=factor.label(i),
                    mean=summary["mean"],
                    ci95=summary["ci95"],
                    n_seeds=summary["n"],
                    diff_vs_baseline=None if i == base else _matched_difference(table, f, i, base),
                )
            )
        out.append(MainEffect(factor=factor.name, baseline=factor.label(base), levels=levels))
    return out


def _one_at_a_time(grid: Grid, table: _Table) -> OneAtATime | None:
    factors = grid.recipe.factors
    if not grid.recipe.baseline_given or not factors:
        return None
    base = tuple(grid.recipe.baseline[f.name] for f in factors)
    base_vals = {s: table.value[(base, s)] for s in table.seeds if (base, s) in table.value}
    rows = []
    for f, factor in enumerate(factors):
        for i in range(len(factor.levels)):
            if i == base[f]:
                continue
            cell = base[:f] + (i,) + base[f + 1 :]
            vals = {s: table.value[(cell, s)] for s in table.seeds if (cell, s) in table.value}
            seeds = sorted(set(vals) & set(base_vals))
            cmp = stats.paired([vals[s] for s in seeds], [base_vals[s] for s in seeds])
            rows.append(
                OneAtATimeRow(
                    factor=factor.name,
                    label=factor.label(i),
                    n_pairs=len(seeds),
                    mean=statistics.fmean(vals.values()) if vals else None,
                    diff_mean=cmp["diff_mean"] if cmp else None,
                    ci95=cmp["ci95"] if cmp else None,
                    p_value=cmp["p_value"] if cmp else None,
                )
            )
    labels = {f.name: f.label(b) for f, b in zip(factors, base)}
    return OneAtATime(
        baseline=labels, baseline_mean=statistics.fmean(base_vals.values()) if base_vals else None, rows=rows
    )


def _interactions(grid: Grid, table: _Table) -> list[Interaction]:
    factors = grid.recipe.factors
    pick = max if grid.goal is Goal.MAX else min
    out = []
    for a, b in itertools.permutations(range(len(factors)), 2):
        if a > b and len(factors) == 2:
            continue  # with two factors one orientation says it all
        means = {}
        for j in range(len(factors[b].levels)):
            row = {}
            for i in range(len(factors[a].levels)):
                vals = [v for (lv, _), v in table.value.items() if lv[a] == i and lv[b] == j]
                row[factors[a].label(i)] = statistics.fmean(vals) if vals else None
            means[factors[b].label(j)] = row
        best = {}
        for bl, row in means.items():
            known = {k: v for k, v in row.items() if v is not None}
            best[bl] = pick(known, key=known.get) if known else None
        distinct = {v for v in best.values() if v is not None}
        out.append(
            Interaction(a=factors[a].name, b=factors[b].name, means=means, best_a_by_b=best, depends=len(distinct) > 1)
        )
    return out


def _level_cells(table: _Table, f: int, i: int, statuses=None):
    return [c for c, st in table.status.items() if c[0][f] == i and (statuses is None or st in statuses)]


def _mean_of(values):
    values = [v for v in values if v is not None]
    return statistics.fmean(values) if values else None


def _regularization(grid: Grid, table: _Table) -> list[RegularizationRow]:
    out = []
    for f, factor in enumerate(grid.recipe.factors):
        if not set(factor.paths) & REGULARIZATION_PATHS:
            continue
        for i in range(len(factor.levels)):
            done = [c for c in _level_cells(table, f, i) if c in table.value]
            out.append(
                RegularizationRow(
                    factor=factor.name,
                    label=factor.label(i),
                    n=len(done),
                    mean=_mean_of(table.value[c] for c in done),
                    gap=_mean_of(table.diag[c].get("gap") for c in done),
                    zero_fraction=_mean_of(table.diag[c].get("zero_fraction") for c in done),
                    near_zero_fraction=_mean_of(table.diag[c].get("near_zero_fraction") for c in done),
                )
            )
    return out


def _epochs_to_reach(curve: list, goal: Goal) -> int | None:
    values = [v for v in curve if v is not None]
    if not values:
        return None
    up = goal is Goal.MAX
    best = max(values) if up else min(values)
    target = REACH * best if up else best / REACH
    for epoch, v in enumerate(curve, 1):
        if v is not None and (v >= target if up else v <= target):
            return epoch
    return None


def _optimization(grid: Grid, table: _Table) -> list[OptimizationRow]:
    out = []
    name = f"val_{table.metric}"
    for f, factor in enumerate(grid.recipe.factors):
        if not set(factor.paths) & OPTIMIZATION_PATHS:
            continue
        for i in range(len(factor.levels)):
            cells = _level_cells(table, f, i)
            done = [c for c in cells if c in table.value]
            reach, final = [], []
            for c in done:
                curves = table.curves.get(table.key[c], {})
                reach.append(_epochs_to_reach(curves.get(name, []), table.goal))
                losses = curves.get("train_loss", [])
                final.append(losses[-1] if losses else None)
            out.append(
                OptimizationRow(
                    factor=factor.name,
                    label=factor.label(i),
                    n=len(done),
                    mean=_mean_of(table.value[c] for c in done),
                    epochs_to_95pct=_mean_of(reach),
                    final_train_loss=_mean_of(final),
                    diverged=sum(1 for c in cells if table.status[c] is Status.DIVERGED),
                )
            )
    return out


def ablation(grid: Grid, store: Store) -> Ablation:
    table = _Table(grid, store, with_curves=any(set(f.paths) & OPTIMIZATION_PATHS for f in grid.recipe.factors))
    return Ablation(
        metric=grid.rank_by,
        main_effects=_main_effects(grid, table),
        one_at_a_time=_one_at_a_time(grid, table),
        interactions=_interactions(grid, table),
        regularization=_regularization(grid, table),
        optimization=_optimization(grid, table),
    )
