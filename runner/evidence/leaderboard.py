"""The leaderboard: one row per configuration, ranked on the validation metric.

Rows carry mean, sd and a 95% interval over seeds (with the validation protocol's variance),
the selection-aware verdict (verdicts.py: possibly best, behind, within a margin, or no
verdict, with its simultaneous interval), a paired comparison with the top row over shared
seeds (exact sign-flip p on a fixed split), the test metric beside (never ranked on: the
test rows are the same for every job and never used to choose), failure counts and flags.
``leaderboard`` returns the typed ``Leaderboard`` (document.py) that every renderer, the
diff and the report read.
"""

from __future__ import annotations

import dataclasses
import statistics
from typing import Any

from runner.components.metrics import Goal
from runner.evidence import race_board, stats
from runner.evidence.ablation import ablation
from runner.evidence.advice import advise
from runner.evidence.cautions import cautions
from runner.evidence.document import Comparison, Counts, Environment, Leaderboard, Row
from runner.evidence.flags import flags, mean_diagnostics
from runner.evidence.paired import paired_difference
from runner.evidence.protocols import FIXED, Resampling
from runner.evidence.verdicts import Assessment, assess
from runner.recipe.grid import Config, Grid
from runner.store.database import Store, StoredJob
from runner.training.job import Status

__all__ = ["leaderboard", "protocol_of"]

Units = dict[tuple[int, int | None], float]


def leaderboard(grid: Grid, store: Store, margin: float | None = None) -> Leaderboard:
    """The board of ``grid`` from ``store``; ``margin`` overrides [verdicts] margin."""
    jobs = list(grid)
    stored = {r.key: r for r in store.jobs({j.key for j in jobs})}
    metrics = store.metrics()
    by_config: dict[str, list] = {}
    for job in jobs:
        by_config.setdefault(job.config.id, []).append(job)
    split = grid.rank_by.split(".", 1)[0]
    units = {c.id: _units(by_config[c.id], stored, metrics, split, grid.metric) for c in grid.configs}
    protocol = protocol_of(grid, stored.values())
    rows = [_row(grid, c, by_config[c.id], stored, metrics, units[c.id], protocol) for c in grid.configs]
    margin = grid.recipe.verdicts.margin if margin is None else margin
    race = race_board.current(grid, store, protocol)  # None unless [adaptive]
    found = race_board.race_assessment(race) if race is not None and race.plan.metric == grid.rank_by else None
    if found is None:
        found = assess(units, {r.config_id: r.complete for r in rows}, str(grid.goal), protocol,
                       grid.recipe.verdicts.alpha, margin)  # fmt: skip
    rows = [dataclasses.replace(r, verdict=found.verdicts[r.config_id]) for r in rows]
    rows = _rank(race_board.with_race(rows, race) if race else rows, grid.goal, race_board.order(race) if race else {})
    rows = _compare_with_top(rows, units, found, protocol)
    labels = {r.config_id: r.label for r in rows}
    extra = race_board.caution(race, labels, sum((r.counts for r in rows), Counts()), grid.rank_by) if race else []
    return Leaderboard(
        recipe=grid.recipe.name, recipe_hash=grid.recipe.hash, description=grid.recipe.description,
        metric=grid.rank_by, goal=grid.goal, test_metric=f"test.{grid.metric}", task=str(grid.task),
        seeds=list(grid.recipe.seeds),
        factors=[{"name": f.name, "paths": list(f.paths), "levels": [f.label(i) for i in range(len(f.levels))]}
                 for f in grid.recipe.factors],
        base_settings=_base_settings(grid),
        data={"fingerprints": sorted({c.data_id for c in grid.configs}),
              "test_fingerprints": sorted({r.diagnostics["split"]["test_rows"] for r in stored.values()
                                           if "split" in r.diagnostics})},
        protocol=_protocol_doc(grid, protocol), evidence=_evidence_doc(grid, found, margin), monitor=grid.monitor,
        jobs=sum((r.counts for r in rows), Counts()), rows=rows,
        ablation=ablation(race_board.first_round_grid(grid) if race else grid, store, protocol),
        environment=_environment(stored.values()), cautions=cautions(rows, grid, protocol, found, margin) + extra,
        race=race_board.race_doc(race, labels, sum((r.counts for r in rows), Counts())) if race else None,
        advice=advise(rows, units, protocol, grid.recipe.verdicts.alpha, margin),
    )  # fmt: skip


def _units(cjobs: list, stored: dict[str, StoredJob], metrics: dict, split: str, metric: str) -> Units:
    """Each done job's value of the rank metric, by (seed, fold)."""
    out: Units = {}
    for job in cjobs:
        row = stored.get(job.key)
        if row is None or row.status is not Status.DONE:
            continue
        value = metrics.get(job.key, {}).get(split, {}).get(metric)
        if value is not None:
            out[(job.seed, job.fold)] = value
    return out


def _per_seed(units: Units) -> dict[int, float]:
    """Per seed: its value, or under k-fold validation the mean over its folds."""
    seeds: dict[int, list[float]] = {}
    for (seed, _), value in units.items():
        seeds.setdefault(seed, []).append(value)
    return {s: statistics.fmean(v) for s, v in sorted(seeds.items())}


def _summary(units: Units, protocol: Resampling) -> dict[str, Any]:
    """n seeds, mean and sd over seeds, and the 95% interval of the mean with the protocol's
    variance (Nadeau & Bengio 2003 when seeds redraw the split; over every fold under k-fold)."""
    per_seed = list(_per_seed(units).values())
    out = stats.summarize(per_seed)
    if len(per_seed) < 2:
        return out
    values = list(units.values())
    if protocol.kind == "repeated_kfold":
        folds = {}
        for (seed, _), v in units.items():
            folds.setdefault(seed, []).append(v)
        whole = [vs for vs in folds.values() if len(vs) == protocol.folds]
        values = [v for vs in whole for v in vs]
        protocol = Resampling.repeated_kfold(protocol.folds, max(1, len(whole)))
        if len(whole) < 2:
            return {**out, "ci95": None}
    spread = paired_difference(values, protocol)
    return {**out, "ci95": [spread.low, spread.high] if spread.low is not None else None}


def _row(grid: Grid, config: Config, cjobs: list, stored: dict[str, StoredJob], metrics: dict, units: Units,
         protocol: Resampling) -> Row:  # fmt: skip
    test_units = _units(cjobs, stored, metrics, "test", grid.metric)
    counts = dict.fromkeys(Status, 0) | {"pending": 0}
    done_diags, best_epochs = [], []
    started = []  # every finished job's diagnostics (the initialization flags read diverged jobs too)
    for job in cjobs:
        row = stored.get(job.key)
        if row is None:
            counts["pending"] += 1
            continue
        counts[row.status] += 1
        started.append(row.diagnostics)
        if row.status is Status.DONE:
            done_diags.append(row.diagnostics)
            if row.best_epoch is not None:
                best_epochs.append(row.best_epoch)
    per_seed, test_seed = _per_seed(units), _per_seed(test_units)
    summary = _summary(units, protocol)
    tally = Counts(**{str(k): v for k, v in counts.items()})
    complete = tally.diverged + tally.failed + tally.timeout == 0
    return Row(
        config_id=config.id, levels=dict(config.assignments), labels=grid.labels(config), n=summary["n"],
        mean=summary["mean"], std=summary["std"], ci95=summary["ci95"],
        per_seed={str(s): v for s, v in per_seed.items()},
        test_mean=statistics.fmean(test_seed.values()) if test_seed else None,
        test_per_seed={str(s): v for s, v in test_seed.items()}, counts=tally,
        diagnostics=mean_diagnostics(done_diags),
        flags=flags(done_diags, tally, grid.recipe.diagnostics, init_diags=started),
        complete=complete,
        best_epoch_median=statistics.median(best_epochs) if best_epochs and config.settings.train.patience else None,
    )  # fmt: skip


def _rank(rows: list[Row], goal: Goal, dropped: dict[str, int]) -> list[Row]:
    """Rows whose seeds all finished first, by mean (equal means share a rank, the next rank
    skipping as many places); then rows with a seed that did not finish, by their survivors'
    mean; rows with no finished seed last, unranked. In a race, ``dropped`` orders the
    configurations it dropped after those still in it, later drops first."""
    sign = -1.0 if goal is Goal.MAX else 1.0
    rows = sorted(rows, key=lambda r: (r.mean is None, not r.complete, dropped.get(r.config_id, 0),
                                       sign * r.mean if r.mean is not None else 0.0))  # fmt: skip
    out, previous, rank = [], None, 0
    for place, row in enumerate(rows, 1):
        if row.mean is None:
            out.append(dataclasses.replace(row, rank=None))
            continue
        key = (row.complete, dropped.get(row.config_id, 0), row.mean)
        rank = rank if key == previous else place
        previous = key
        out.append(dataclasses.replace(row, rank=rank))
    return out


def _compare_with_top(rows: list[Row], units: dict[str, Units], found: Assessment, protocol: Resampling) -> list[Row]:
    """Each assessed row against the top row, paired over the matched units; Holm across rows."""
    assessed = [r for r in rows if r.verdict is not None and r.verdict.kind != "no_verdict"]
    if len(assessed) < 2:
        return rows
    top = assessed[0]
    matched = found.units
    found_protocol = protocol
    if protocol.kind == "repeated_kfold":
        found_protocol = Resampling.repeated_kfold(protocol.folds, len({s for s, _ in matched}))
    compared = {}
    for row in assessed[1:]:
        shared = [u for u in matched if u in units[row.config_id]]  # a raced row may have fewer seeds
        d = [units[row.config_id][u] - units[top.config_id][u] for u in shared]
        if protocol.kind == "repeated_kfold":
            found_protocol = Resampling.repeated_kfold(protocol.folds, len({s for s, _ in shared}))
        pd = paired_difference(d, found_protocol)
        ci = [pd.low, pd.high] if pd.low is not None else None
        compared[row.config_id] = Comparison(pd.mean, ci, pd.p_value, pd.basis, len(d))
    adjusted = dict(zip(compared, stats.holm([c.p_value for c in compared.values()])))
    return [
        dataclasses.replace(r, vs_best=dataclasses.replace(compared[r.config_id], p_holm=adjusted[r.config_id]))
        if r.config_id in compared else r
        for r in rows
    ]  # fmt: skip


def protocol_of(grid: Grid, stored) -> Resampling:
    """The validation protocol of the grid's jobs, with the split sizes its variance needs
    (the largest val/train ratio when data.split.val varies)."""
    split = grid.configs[0].settings.data.split
    if split.validation == "fixed":
        return FIXED
    if split.validation == "folds":
        return Resampling.repeated_kfold(split.folds, max(1, len(grid.recipe.seeds)))
    sizes = [(r.diagnostics["split"]["val"], r.diagnostics["split"]["train"]) for r in stored
             if "split" in r.diagnostics]  # fmt: skip
    if not sizes:  # results stored without their split sizes: the fractions give the ratio
        sizes = [(round(1000 * s.val), round(1000 * (1 - s.val - s.test)))
                 for s in {c.settings.data.split for c in grid.configs}]  # fmt: skip
    n_val, n_train = max(sizes, key=lambda s: s[0] / max(1, s[1]))
    return Resampling.resample(max(1, n_val), max(1, n_train))


def _protocol_doc(grid: Grid, protocol: Resampling) -> dict[str, Any]:
    split = grid.configs[0].settings.data.split
    return {"validation": split.validation, "folds": split.folds if split.validation == "folds" else None,
            "test_seed": split.test_seed, "n_val": protocol.n_val, "n_train": protocol.n_train,
            "variance": protocol.describe()}  # fmt: skip


def _evidence_doc(grid: Grid, found: Assessment, margin: float) -> dict[str, Any]:
    best = found.best_set
    return {"alpha": grid.recipe.verdicts.alpha, "margin": margin or None, "method": found.method,
            "matched_seeds": sorted({s for s, _ in found.units}), "matched_units": len(found.units),
            "critical": best.critical if best else None, "half_width": best.half_width if best else None,
            "residual_sd": best.residual_sd if best else None}  # fmt: skip


def _base_settings(grid: Grid) -> dict[str, Any]:
    """The resolved settings every configuration shares: those no factor varies."""
    varied = {p for f in grid.recipe.factors for p in f.paths}
    return {
        path: list(value) if isinstance(value, tuple) else value
        for path, value in grid.configs[0].settings.flat().items()
        if path not in varied
    }


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
