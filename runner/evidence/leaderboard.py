"""The leaderboard: one row per configuration, ranked on the validation metric.

Rows carry mean, sd and a 95% Student-t interval over seeds, the paired comparison with the
best row (paired t-test over shared seeds, Holm-adjusted across rows), the test metric beside
(never ranked on), failure counts and diagnostic flags. ``leaderboard`` returns the
versioned JSON document that every renderer, the diff and the report read.
"""
from __future__ import annotations

import statistics
from typing import Any

from runner.evidence import stats
from runner.evidence.ablation import ablation
from runner.recipe.grid import Grid
from runner.store.database import Store

__all__ = ["leaderboard", "FORMAT", "FORMAT_VERSION", "CAUTION_TEST", "ALPHA"]

FORMAT = "recipe-leaderboard"
FORMAT_VERSION = 1
ALPHA = 0.05
CAUTION_TEST = ("Ranked on val; test is shown beside it. Choosing a configuration by its test "
                "score makes that test score optimistic.")


def _config_levels(grid: Grid, config) -> dict[str, Any]:
    return {path: value for path, value in config.assignments.items()}


def leaderboard(grid: Grid, store: Store) -> dict:
    jobs = list(grid)
    keys = {j.key for j in jobs}
    rows_by_key = {r["key"]: r for r in store.jobs(keys)}
    metrics = store.metrics()
    split, metric = grid.rank_by.split(".", 1)
    thresholds = grid.recipe.diagnostics
    rows = []
    for config in grid.configs:
        cjobs = [j for j in jobs if j.config.id == config.id]
        per_seed, test_seed = {}, {}
        counts = {"done": 0, "diverged": 0, "failed": 0, "timeout": 0, "pending": 0}
        diags = []
        for job in cjobs:
            stored = rows_by_key.get(job.key)
            if stored is None:
                counts["pending"] += 1
                continue
            counts[stored["status"]] = counts.get(stored["status"], 0) + 1
            if stored["status"] != "done":
                continue
            value = metrics.get(job.key, {}).get(split, {}).get(metric)
            if value is not None:
                per_seed[job.seed] = value
            test = metrics.get(job.key, {}).get("test", {}).get(metric)
            if test is not None:
                test_seed[job.seed] = test
            diags.append(stored["diagnostics"])
        summary = stats.describe(list(per_seed.values()))
        rows.append({
            "config_id": config.id,
            "levels": _config_levels(grid, config),
            "labels": grid.labels(config),
            **summary,
            "per_seed": {str(s): v for s, v in sorted(per_seed.items())},
            "test_mean": statistics.fmean(test_seed.values()) if test_seed else None,
            "test_per_seed": {str(s): v for s, v in sorted(test_seed.items())},
            "counts": counts,
            "diagnostics": _mean_diagnostics(diags),
            "flags": _flags(diags, counts, thresholds),
        })
    sign = -1.0 if grid.goal == "max" else 1.0
    rows.sort(key=lambda r: (r["mean"] is None, sign * r["mean"] if r["mean"] is not None else 0.0))
    _compare_with_best(rows)
    for rank, row in enumerate(rows, 1):
        row["rank"] = rank if row["mean"] is not None else None
    return {
        "format": FORMAT,
        "version": FORMAT_VERSION,
        "recipe": grid.recipe.name,
        "recipe_hash": grid.recipe.hash,
        "description": grid.recipe.description,
        "metric": grid.rank_by,
        "goal": grid.goal,
        "test_metric": f"test.{metric}",
        "task": grid.task,
        "seeds": list(grid.recipe.seeds),
        "factors": [{"name": f.name, "paths": list(f.paths),
                     "levels": [f.label(i) for i in range(len(f.levels))]} for f in grid.recipe.factors],
        "base_settings": _base_settings(grid),
        "data": sorted({c.data_id for c in grid.configs}),
        "jobs": _totals(rows),
        "rows": rows,
        "ablation": ablation(grid, store),
        "environment": _environment(rows_by_key.values()),
        "cautions": _cautions(rows, grid),
    }


def _base_settings(grid: Grid) -> dict:
    """The resolved settings every configuration shares: those no factor varies."""
    varied = {p for f in grid.recipe.factors for p in f.paths}
    flat = {}

    def walk(node, prefix):
        for key, value in node.items():
            path = f"{prefix}.{key}"
            if isinstance(value, dict):
                walk(value, path)
            elif path not in varied:
                flat[path] = list(value) if isinstance(value, tuple) else value

    for section, values in grid.configs[0].settings.items():
        walk(values, section)
    return flat


def _compare_with_best(rows: list[dict]) -> None:
    """Paired difference to the best row over the seeds both finished; Holm across rows."""
    ranked = [r for r in rows if r["mean"] is not None]
    if not ranked:
        return
    best = ranked[0]
    best["vs_best"] = None
    best["top_group"] = True
    tests = []
    for row in ranked[1:]:
        seeds = sorted(set(row["per_seed"]) & set(best["per_seed"]), key=int)
        result = stats.paired([row["per_seed"][s] for s in seeds], [best["per_seed"][s] for s in seeds])
        if result is None:
            row["vs_best"] = None
            row["top_group"] = None  # cannot tell with fewer than two shared seeds
            continue
        result["n_pairs"] = len(seeds)
        result["wilcoxon_p"] = stats.wilcoxon_p([row["per_seed"][s] for s in seeds],
                                                [best["per_seed"][s] for s in seeds])
        row["vs_best"] = result
        tests.append(row)
    for row, adjusted in zip(tests, stats.holm([r["vs_best"]["p_value"] for r in tests])):
        row["vs_best"]["p_holm"] = adjusted
        row["top_group"] = adjusted >= ALPHA
    for row in rows:
        row.setdefault("vs_best", None)
        row.setdefault("top_group", None)


def _mean_diagnostics(diags: list[dict]) -> dict:
    out = {}
    for name in ("grad_ratio", "dead_fraction", "saturated_fraction", "zero_fraction",
                 "near_zero_fraction", "gap"):
        values = [d[name] for d in diags if d.get(name) is not None]
        out[name] = statistics.fmean(values) if values else None
    return out


def _flags(diags: list[dict], counts: dict, th) -> list[str]:
    flags = []
    total = sum(counts.values()) - counts["pending"]
    if counts["diverged"]:
        flags.append(f"diverged {counts['diverged']}/{total}")
    if counts["failed"]:
        flags.append(f"failed {counts['failed']}/{total}")
    if counts["timeout"]:
        flags.append(f"timed out {counts['timeout']}/{total}")

    def median(name):
        values = [d[name] for d in diags if d.get(name) is not None]
        return statistics.median(values) if values else None

    ratio = median("grad_ratio")
    if ratio is not None and ratio < th["vanishing_below"]:
        flags.append("vanishing gradients")
    if ratio is not None and ratio > th["exploding_above"]:
        flags.append("exploding gradients")
    dead = median("dead_fraction")
    if dead is not None and dead > th["dead_above"]:
        flags.append("dead units")
    sat = median("saturated_fraction")
    if sat is not None and sat > th["saturated_above"]:
        flags.append("saturated units")
    gap = median("gap")
    if gap is not None and gap > th["gap_above"]:
        flags.append("overfitting")
    return flags


def _totals(rows: list[dict]) -> dict:
    totals = {"done": 0, "diverged": 0, "failed": 0, "timeout": 0, "pending": 0}
    for row in rows:
        for k, v in row["counts"].items():
            totals[k] = totals.get(k, 0) + v
    totals["total"] = sum(totals.values())
    return totals


def _environment(stored) -> dict:
    """The environments the stored jobs ran in; more than one means results may not compare.
    Recipe versions are counted apart: an edited recipe keeps the results of unchanged jobs."""
    seen, recipes = {}, set()
    for job in stored:
        env = {k: v for k, v in job["env"].items() if k != "pid"}
        seen[tuple(sorted(env.items()))] = env
        recipes.add(job.get("recipe_hash"))
    values = list(seen.values())
    differing = sorted({k for env in values for k in env if len({str(e.get(k)) for e in values}) > 1})
    return {"distinct": len(values), "differs_in": differing, "first": values[0] if values else None,
            "recipe_versions": len(recipes)}


def _cautions(rows: list[dict], grid: Grid) -> list[str]:
    notes = [CAUTION_TEST]
    if len(grid.recipe.seeds) < 2:
        notes.append("Only one seed: no interval or test can tell configurations apart; add seeds.")
    top = [r for r in rows if r.get("top_group")]
    if len(top) > 1:
        notes.append(f"{len(top)} configurations cannot be told apart from the best at the 5% level "
                     "(paired t-test over seeds, Holm-adjusted): treat them as tied.")
    return notes
