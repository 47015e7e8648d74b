"""Ablation tables: what each factor does, measured over matched configurations and seeds only.

The board's rule holds here too (verdicts.py): a configuration with a seed that did not
finish is left out. A factor's levels are compared only in *contexts* (levels of the other
factors) where every level of it finished, on the seeds (and folds) all of those
configurations finished, so an [[exclude]] rule or a diverged configuration cannot bias a
level's mean; where a level cannot be matched it says so instead of printing a biased mean.

- Main effects: each level's mean over the matched contexts and units, and its difference to
  the factor's baseline: per unit (seed, fold) the mean of the matched differences, then the
  paired interval and test over units with the board's validation protocol (exact sign-flip
  p on a fixed split, the corrected t otherwise; paired.py).
- One factor at a time (when the recipe names a [baseline]): the baseline configuration
  against each configuration that changes one factor, paired over units.
- Interactions: for each pair of factors, the two-way table of means over matched contexts,
  the A x B F test with seeds as blocks, and the 2 x 2 interaction contrasts with
  simultaneous (Scheffe) intervals (blocks.py); "the best level of A depends on B" is
  claimed only when a contrast's interval excludes zero.
- Regularization and optimization views (views.py).
"""

from __future__ import annotations

import itertools
import statistics
from collections.abc import Sequence

import numpy as np

from runner.components.metrics import Goal
from runner.evidence.blocks import interaction_contrasts, two_way_blocks
from runner.evidence.document import (
    Ablation,
    Interaction,
    LevelEffect,
    MainEffect,
    MatchedDifference,
    OneAtATime,
    OneAtATimeRow,
)
from runner.evidence.paired import paired_difference
from runner.evidence.protocols import FIXED, Resampling
from runner.evidence.views import AblationTable, optimization_view, regularization_view
from runner.recipe.grid import Grid
from runner.store.database import Store

__all__ = ["ablation"]

Levels = tuple[int, ...]
Unit = tuple[int, "int | None"]


def _protocol_for(protocol: Resampling, units: Sequence[Unit]) -> Resampling:
    if protocol.kind == "repeated_kfold":
        return Resampling.repeated_kfold(protocol.folds, len({s for s, _ in units}))
    return protocol


def _units_of(table: AblationTable, configs: Sequence[Levels]) -> list[Unit]:
    """The units every one of ``configs`` finished (all folds of a seed, under k-fold)."""
    if not configs:
        return []
    common = set.intersection(*(set(table.units[c]) for c in configs))
    by_seed: dict[int, list] = {}
    for seed, fold in common:
        by_seed.setdefault(seed, []).append(fold)
    whole = max((len(v) for v in by_seed.values()), default=0)
    return sorted((s, f) for s, folds in by_seed.items() if len(folds) == whole for f in folds)  # type: ignore[misc]


def _contexts(table: AblationTable, f: int, levels: Sequence[int]) -> tuple[list[Levels], int]:
    """Contexts (the other factors' levels) in which every one of ``levels`` of factor f
    finished completely, and how many contexts exist in the grid."""
    contexts = {c[:f] + c[f + 1 :] for c in table.configs}
    out = []
    for ctx in sorted(contexts):
        cells = [ctx[:f] + (i,) + ctx[f:] for i in levels]
        if all(c in table.complete for c in cells):
            out.append(ctx)
    return out, len(contexts)


def _cell(ctx: Levels, f: int, i: int) -> Levels:
    return ctx[:f] + (i,) + ctx[f:]


def _difference(table: AblationTable, cells: list[tuple[Levels, Levels]], protocol: Resampling):
    """The paired summary of (a - b) over matched units, averaged within each unit over the
    matched pairs of configurations; None without a matched unit."""
    units = _units_of(table, [c for pair in cells for c in pair])
    if not units:
        return None, units
    d = [statistics.fmean(table.units[a][u] - table.units[b][u] for a, b in cells) for u in units]
    return paired_difference(d, _protocol_for(protocol, units)), units


def _level_effect(table, f, i, base, contexts, protocol) -> LevelEffect:
    cells = [_cell(ctx, f, i) for ctx in contexts]
    units = _units_of(table, [_cell(ctx, f, j) for ctx in contexts for j in (i, base)])
    label = table.factors[f].label(i)
    if not units:
        return LevelEffect(label, None, None, 0, None)
    per_unit = [statistics.fmean(table.units[c][u] for c in cells) for u in units]
    spread = paired_difference(per_unit, _protocol_for(protocol, units))
    ci = [spread.low, spread.high] if spread.low is not None else None
    diff = None
    if i != base:
        pd, _ = _difference(table, [(_cell(ctx, f, i), _cell(ctx, f, base)) for ctx in contexts], protocol)
        ci_d = [pd.low, pd.high] if pd.low is not None else None
        diff = MatchedDifference(pd.mean, ci_d, pd.p_value, pd.basis, len(contexts), len({s for s, _ in units}))
    return LevelEffect(label, float(np.mean(per_unit)), ci, len({s for s, _ in units}), diff)


def _main_effects(grid: Grid, table: AblationTable, protocol: Resampling) -> list[MainEffect]:
    out = []
    for f, factor in enumerate(grid.recipe.factors):
        base = grid.recipe.baseline[factor.name]
        levels = list(range(len(factor.levels)))
        contexts, total = _contexts(table, f, levels)
        note = ""
        if not contexts:
            note = "no context in which every level finished: the levels cannot be matched"
        elif len(contexts) < total:
            note = f"over the {len(contexts)} of {total} contexts in which every level finished"
        effects = [_level_effect(table, f, i, base, contexts, protocol) if contexts
                   else LevelEffect(factor.label(i), None, None, 0, None) for i in levels]  # fmt: skip
        out.append(MainEffect(factor.name, factor.label(base), effects, len(contexts), total, note))
    return out


def _one_at_a_time(grid: Grid, table: AblationTable, protocol: Resampling) -> OneAtATime | None:
    factors = grid.recipe.factors
    if not grid.recipe.baseline_given or not factors:
        return None
    base = tuple(grid.recipe.baseline[f.name] for f in factors)
    rows = []
    for f, factor in enumerate(factors):
        for i in range(len(factor.levels)):
            if i == base[f]:
                continue
            cell = base[:f] + (i,) + base[f + 1 :]
            mean = _mean_units(table, cell)
            if cell not in table.complete or base not in table.complete:
                rows.append(OneAtATimeRow(factor.name, factor.label(i), 0, mean, None, None, None, "not matched"))
                continue
            pd, units = _difference(table, [(cell, base)], protocol)
            if pd is None:
                rows.append(OneAtATimeRow(factor.name, factor.label(i), 0, mean, None, None, None, "not matched"))
                continue
            ci = [pd.low, pd.high] if pd.low is not None else None
            rows.append(OneAtATimeRow(factor.name, factor.label(i), len({s for s, _ in units}), mean, pd.mean, ci,
                                      pd.p_value, pd.basis))  # fmt: skip
    labels = {f.name: f.label(b) for f, b in zip(factors, base)}
    return OneAtATime(labels, _mean_units(table, base), rows)


def _mean_units(table: AblationTable, cell: Levels) -> float | None:
    values = list(table.units.get(cell, {}).values())
    return statistics.fmean(values) if values else None


def _interaction(grid: Grid, table: AblationTable, a: int, b: int, protocol: Resampling) -> Interaction:
    fa, fb = grid.recipe.factors[a], grid.recipe.factors[b]
    la, lb = range(len(fa.levels)), range(len(fb.levels))
    others = [k for k in range(len(grid.recipe.factors)) if k not in (a, b)]
    contexts = sorted({tuple(c[k] for k in others) for c in table.configs})

    def cell(i, j, ctx):
        full = dict(zip(others, ctx)) | {a: i, b: j}
        return tuple(full[k] for k in range(len(grid.recipe.factors)))

    used = [ctx for ctx in contexts if all(cell(i, j, ctx) in table.complete for i in la for j in lb)]
    units = _units_of(table, [cell(i, j, ctx) for ctx in used for i in la for j in lb])
    means: dict[str, dict[str, float | None]] = {fb.label(j): {fa.label(i): None for i in la} for j in lb}
    if not used or len({s for s, _ in units}) < 2:
        note = "no context in which every pair of levels finished" if not used else "fewer than 2 matched seeds"
        return Interaction(fa.name, fb.name, means, dict.fromkeys(means), False, None, None, note)
    y = np.array([[[statistics.fmean(table.units[cell(i, j, ctx)][u] for ctx in used) for u in units]
                   for j in lb] for i in la])  # fmt: skip
    for i in la:
        for j in lb:
            means[fb.label(j)][fa.label(i)] = float(y[i, j].mean())
    pick = max if grid.goal is Goal.MAX else min
    best = {bl: pick(row, key=row.get) for bl, row in means.items()}
    prot = _protocol_for(protocol, units)
    contrasts = interaction_contrasts(y, protocol=prot)
    claimed = [c for c in contrasts if c.claimed]
    largest = max(contrasts, key=lambda c: abs(c.estimate))
    shown = {"estimate": largest.estimate, "low": largest.low, "high": largest.high,
             "a": [fa.label(k) for k in largest.a_levels], "b": [fb.label(k) for k in largest.b_levels]}  # fmt: skip
    note = "" if len(used) == len(contexts) else f"over {len(used)} of {len(contexts)} contexts"
    return Interaction(fa.name, fb.name, means, best, bool(claimed), two_way_blocks(y, prot).interaction.p_value,
                       shown, note)  # fmt: skip


def _interactions(grid: Grid, table: AblationTable, protocol: Resampling) -> list[Interaction]:
    n = len(grid.recipe.factors)
    return [_interaction(grid, table, a, b, protocol) for a, b in itertools.combinations(range(n), 2)]


def ablation(grid: Grid, store: Store, protocol: Resampling = FIXED) -> Ablation:
    table = AblationTable(grid, store)
    return Ablation(
        metric=grid.rank_by,
        main_effects=_main_effects(grid, table, protocol),
        one_at_a_time=_one_at_a_time(grid, table, protocol),
        interactions=_interactions(grid, table, protocol),
        regularization=regularization_view(grid, table),
        optimization=optimization_view(grid, table),
        protocol=protocol.kind,
    )
