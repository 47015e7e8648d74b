"""The stored facts the ablation tables read, and the two descriptive views: regularization
(val metric, train-val gap, weight sparsity) and optimization (epochs to reach 95% of the
best val metric, final training loss, divergences) per level of the factors that touch them.
The views' means use configurations whose seeds all finished (the board's rule); their
divergence counts use every job."""

from __future__ import annotations

import statistics

from runner.components.metrics import METRICS, Goal
from runner.evidence.document import OptimizationRow, RegularizationRow
from runner.recipe.grid import Grid
from runner.store.database import Store
from runner.training.job import Status

__all__ = ["OPTIMIZATION_PATHS", "REGULARIZATION_PATHS", "AblationTable", "optimization_view", "regularization_view"]

REGULARIZATION_PATHS = {
    "train.l1", "train.l2", "train.l1_mode", "train.weight_decay", "train.patience", "model.dropout",
    "model.input_dropout", "model.batch_norm",
}  # fmt: skip
OPTIMIZATION_PATHS = {
    "train.optimizer", "train.lr", "train.momentum", "train.beta1", "train.beta2", "train.alpha", "train.eps",
    "train.schedule", "train.batch_size", "train.clip_norm",
}  # fmt: skip
REACH = 0.95  # "epochs to reach 95% of the configuration's best val metric"


class AblationTable:
    """Per configuration (its factor levels): each finished unit's (seed, fold) value of the
    rank metric, whether all its jobs finished, its jobs' statuses, diagnostics and curves."""

    def __init__(self, grid: Grid, store: Store):
        split, self.metric = grid.rank_by.split(".", 1)
        self.goal = grid.goal
        self.factors = grid.recipe.factors
        stored = {r.key: r for r in store.jobs({j.key for j in grid})}
        metrics = store.metrics()
        self.configs = [c.levels for c in grid.configs]
        self.units: dict[tuple, dict] = {c: {} for c in self.configs}
        self.statuses: dict[tuple, list[Status]] = {c: [] for c in self.configs}
        self.diags: dict[tuple, list[dict]] = {c: [] for c in self.configs}
        self.keys: dict[tuple, list[str]] = {c: [] for c in self.configs}
        broken = set()
        for job in grid:
            row = stored.get(job.key)
            levels = job.config.levels
            if row is None:
                continue
            self.statuses[levels].append(row.status)
            if row.status is not Status.DONE:
                broken.add(levels)
                continue
            value = metrics.get(job.key, {}).get(split, {}).get(self.metric)
            if value is not None:
                self.units[levels][(job.seed, job.fold)] = value
                self.diags[levels].append(row.diagnostics)
                self.keys[levels].append(job.key)
        # configurations with no failed job and at least one finished unit
        self.complete = {c for c in self.configs if c not in broken and self.units[c]}
        wants_curves = any(set(f.paths) & OPTIMIZATION_PATHS for f in grid.recipe.factors)
        self.curves = store.curves([k for ks in self.keys.values() for k in ks]) if wants_curves else {}


def _mean_of(values):
    values = [v for v in values if v is not None]
    return statistics.fmean(values) if values else None


def _level_configs(table: AblationTable, f: int, i: int) -> list[tuple]:
    return [c for c in table.complete if c[f] == i]


def regularization_view(grid: Grid, table: AblationTable) -> list[RegularizationRow]:
    out = []
    for f, factor in enumerate(grid.recipe.factors):
        if not set(factor.paths) & REGULARIZATION_PATHS:
            continue
        for i in range(len(factor.levels)):
            configs = _level_configs(table, f, i)
            diags = [d for c in configs for d in table.diags[c]]
            out.append(RegularizationRow(
                factor=factor.name, label=factor.label(i), n=len(configs),
                mean=_mean_of(v for c in configs for v in table.units[c].values()),
                gap=_mean_of(d.get("gap") for d in diags),
                zero_fraction=_mean_of(d.get("zero_fraction") for d in diags),
                near_zero_fraction=_mean_of(d.get("near_zero_fraction") for d in diags),
            ))  # fmt: skip
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


def optimization_view(grid: Grid, table: AblationTable) -> list[OptimizationRow]:
    out = []
    name = f"val_{grid.monitor}"
    for f, factor in enumerate(grid.recipe.factors):
        if not set(factor.paths) & OPTIMIZATION_PATHS:
            continue
        for i in range(len(factor.levels)):
            configs = _level_configs(table, f, i)
            reach, final = [], []
            for c in configs:
                for key in table.keys[c]:
                    curves = table.curves.get(key, {})
                    reach.append(_epochs_to_reach(curves.get(name, []), METRICS[grid.monitor].goal))
                    losses = curves.get("train_loss", [])
                    final.append(losses[-1] if losses else None)
            diverged = sum(s is Status.DIVERGED for c in table.configs if c[f] == i for s in table.statuses[c])
            out.append(OptimizationRow(
                factor=factor.name, label=factor.label(i), n=len(configs),
                mean=_mean_of(v for c in configs for v in table.units[c].values()),
                epochs_to_95pct=_mean_of(reach), final_train_loss=_mean_of(final), diverged=diverged,
            ))  # fmt: skip
    return out
