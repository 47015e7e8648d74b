"""The leaderboard: one row per configuration, ranked on the validation metric.

Rows carry mean, sd and a 95% Student-t interval over seeds, the paired comparison with the
best row (paired t-test over shared seeds, Holm-adjusted across rows), the test metric beside
(never ranked on), failure counts and diagnostic flags. ``leaderboard`` returns the typed
``Leaderboard`` (document.py) that every renderer, the diff and the report read.
"""

from __future__ import annotations

import dataclasses
import statistics
from typing import Any

from runner.components.metrics import Goal
from runner.evidence import stats
from runner.evidence.ablation import ablation
from runner.evidence.document import Comparison, Counts, Environment, Leaderboard, Row
from runner.evidence.flags import flags, mean_diagnostics
from runner.recipe.grid import Config, Grid
from runner.store.database import Store, StoredJob
from runner.training.job import Status

__all__ = ["ALPHA", "CAUTION_TEST", "leaderboard"]

ALPHA = 0.05
CAUTION_TEST = (
    "Ranked on val; test is shown beside it. Choosing a configuration by its test "
    "score makes that test score optimistic."
)


def leaderboard(grid: Grid, store: Store) -> Leaderboard:
    jobs = list(grid)
    stored = {r.key: r for r in store.jobs({j.key for j in jobs})}
    metrics = store.metrics()
    by_config: dict[str, list] = {}
    for job in jobs:
        by_config.setdefault(job.config.id, []).append(job)
    rows = [_row(grid, config, by_config[config.id], stored, metrics) for config in grid.configs]
    sign = -1.0 if grid.goal is Goal.MAX else 1.0
    rows.sort(key=lambda r: (r.mean is None, sign * r.mean if r.mean is not None else 0.0))
    rows = _compare_with_best(rows)
    rows = [dataclasses.replace(row, rank=rank if row.mean is not None else None) for rank, row in enumerate(rows, 1)]
    return Leaderboard(
        recipe=grid.recipe.name,
        recipe_hash=grid.recipe.hash,
        description=grid.recipe.description,
        metric=grid.rank_by,
        goal=grid.goal,
        test_metric=f"test.{grid.metric}",
        task=str(grid.task),
        seeds=list(grid.recipe.seeds),
        factors=[
            {"name": f.name, "paths": list(f.paths), "levels": [f.label(i) for i in range(len(f.levels))]}
            for f in grid.recipe.factors
        ],
        base_settings=_base_settings(grid),
        data=sorted({c.data_id for c in grid.configs}),
        jobs=sum((r.counts for r in rows), Counts()),
        rows=rows,
        ablation=ablation(grid, store),
        environment=_environment(stored.values()),
        cautions=_cautions(rows, grid),
    )


def _row(grid: Grid, config: Config, cjobs: list, stored: dict[str, StoredJob], metrics: dict) -> Row:
    split, metric = grid.rank_by.split(".", 1)
    per_seed, test_seed = {}, {}
    counts = dict.fromkeys(Status, 0) | {"pending": 0}
    diags, started = [], []  # done jobs' diagnostics; every finished job's (initialization flags)
    for job in cjobs:
        row = stored.get(job.key)
        if row is None:
            counts["pending"] += 1
            continue
        counts[row.status] += 1
        started.append(row.diagnostics)
        if row.status is not Status.DONE:
            continue
        value = metrics.get(job.key, {}).get(split, {}).get(metric)
        if value is not None:
            per_seed[job.seed] = value
        test = metrics.get(job.key, {}).get("test", {}).get(metric)
        if test is not None:
            test_seed[job.seed] = test
        diags.append(row.diagnostics)
    summary = stats.summarize(list(per_seed.values()))  # n, mean, std, ci95
    tally = Counts(**{str(k): v for k, v in counts.items()})
    return Row(
        config_id=config.id,
        levels=dict(config.assignments),
        labels=grid.labels(config),
        n=summary["n"],
        mean=summary["mean"],
        std=summary["std"],
        ci95=summary["ci95"],
        per_seed={str(s): v for s, v in sorted(per_seed.items())},
        test_mean=statistics.fmean(test_seed.values()) if test_seed else None,
        test_per_seed={str(s): v for s, v in sorted(test_seed.items())},
        counts=tally,
        diagnostics=mean_diagnostics(diags),
        flags=flags(diags, tally, grid.recipe.diagnostics, init_diags=started),
    )


def _base_settings(grid: Grid) -> dict[str, Any]:
    """The resolved settings every configuration shares: those no factor varies."""
    varied = {p for f in grid.recipe.factors for p in f.paths}
    return {
        path: list(value) if isinstance(value, tuple) else value
        for path, value in grid.configs[0].settings.flat().items()
        if path not in varied
    }


def _compare_with_best(rows: list[Row]) -> list[Row]:
    """Paired difference to the best row over the seeds both finished; Holm across rows."""
    ranked = [r for r in rows if r.mean is not None]
    if not ranked:
        return rows
    best = ranked[0]
    compared: dict[str, Comparison | None] = {}
    for row in ranked[1:]:
        seeds = sorted(set(row.per_seed) & set(best.per_seed), key=int)
        a, b = [row.per_seed[s] for s in seeds], [best.per_seed[s] for s in seeds]
        result = stats.paired(a, b)
        compared[row.config_id] = (
            None if result is None else Comparison(**result, n_pairs=len(seeds), wilcoxon_p=stats.wilcoxon_p(a, b))
        )
    tested = [cid for cid, c in compared.items() if c is not None]
    adjusted = dict(zip(tested, stats.holm([compared[cid].p_value for cid in tested])))
    out = []
    for row in rows:
        if row is best:
            out.append(dataclasses.replace(row, top_group=True))
        elif row.config_id in adjusted:
            vs = dataclasses.replace(compared[row.config_id], p_holm=adjusted[row.config_id])
            out.append(dataclasses.replace(row, vs_best=vs, top_group=adjusted[row.config_id] >= ALPHA))
        else:
            out.append(row)  # fewer than two shared seeds (or no mean): cannot tell
    return out


def _environment(stored) -> Environment:
    """The environments the stored jobs ran in; more than one means results may not compare.
    Recipe versions are counted apart: an edited recipe keeps the results of unchanged jobs."""
    seen, recipes = {}, set()
    for job in stored:
        env = {k: v for k, v in job.env.items() if k != "pid"}
        seen[tuple(sorted(env.items()))] = env
        recipes.add(job.recipe_hash)
    values = list(seen.values())
    differing = sorted({k for env in values for k in env if len({str(e.get(k)) for e in values}) > 1})
    return Environment(
        distinct=len(values), differs_in=differing, first=values[0] if values else None, recipe_versions=len(recipes)
    )


def _cautions(rows: list[Row], grid: Grid) -> list[str]:
    notes = [CAUTION_TEST]
    if len(grid.recipe.seeds) < 2:
        notes.append("Only one seed: no interval or test can tell configurations apart; add seeds.")
    top = [r for r in rows if r.top_group]
    if len(top) > 1:
        notes.append(
            f"{len(top)} configurations cannot be told apart from the best at the 5% level "
            "(paired t-test over seeds, Holm-adjusted): treat them as tied."
        )
    return notes
