"""A Python API over a recipe and its store, for notebooks (tables as pandas DataFrames: the
``notebook`` extra installs pandas).

    from runner.api import open_study, run

    study = run("recipes/quickstart.toml")      # or open_study(...) to read what is stored
    study.leaderboard()      # one row per configuration: the board's numbers and flags
    study.ablation()         # {"main_effects": df, "one_at_a_time": df, "interactions": df, ...}
    study.curves()           # long: job_key, config_id, <factors>, seed, epoch, curve, value
    study.metrics()          # long: job_key, config_id, <factors>, seed, split, metric, value
    study.jobs()             # one row per job: status, epochs, best epoch, how it trained
    study.board()            # the typed Leaderboard document itself
    study.load_bundle(dir)   # a bundle written by `recipe export`, ready to predict

``run`` trains what is missing exactly as ``recipe run`` does: the same store (default
``runs/<name>.sqlite`` beside the recipe), the same one-runner lock, the same resume (jobs
already stored are not repeated), weights kept as the recipe says, MLflow logging when the
recipe or ``mlflow=`` names a tracking URI. Errors are ``runner.errors.UserError`` with
their fields (``problem``, ``where``, ``key``, ``value``, ``allowed``, ``hint``).
"""

from __future__ import annotations

import dataclasses
from pathlib import Path
from typing import Any

from runner.errors import UserError

__all__ = ["Study", "open_study", "run"]


def _pandas():
    try:
        import pandas as pd
    except ImportError:
        raise UserError(
            "the notebook API's tables need pandas",
            hint='Install it with: python -m pip install -c constraints.txt -e ".[notebook]"',
        ) from None
    return pd


def _flatten(prefix: str, value: Any, out: dict[str, Any]) -> None:
    """A row field as columns: intervals as _low/_high, records and dicts as prefix.name."""
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        for f in dataclasses.fields(value):
            _flatten(f"{prefix}.{f.name}", getattr(value, f.name), out)
    elif isinstance(value, dict):
        for k, v in value.items():
            _flatten(f"{prefix}.{k}", v, out)
    elif prefix.endswith("ci95") or (isinstance(value, list) and len(value) == 2 and prefix.endswith("interval")):
        low, high = value if value else (None, None)
        out[f"{prefix}_low"], out[f"{prefix}_high"] = low, high
    elif isinstance(value, list):
        out[prefix] = "; ".join(getattr(v, "text", str(v)) for v in value)  # a flag by what the board prints
    else:
        out[prefix] = value


class Study:
    """A recipe's grid and the results stored for it; every table is read afresh."""

    def __init__(self, recipe_path: str | Path, store: str | Path | None = None):
        from runner.cli.common import store_path
        from runner.recipe.grid import expand
        from runner.recipe.loader import load_recipe

        self.recipe = load_recipe(recipe_path)
        self.grid = expand(self.recipe)
        self.store_path = store_path(self.recipe, str(store) if store else None)

    def _store(self):
        from runner.store.database import Store

        return Store(self.store_path, create=False)

    def board(self):
        """The leaderboard document (runner.evidence.document.Leaderboard), as `recipe board` has it."""
        from runner.evidence.leaderboard import leaderboard

        with self._store() as db:
            return leaderboard(self.grid, db)

    def _labels(self) -> dict[str, dict[str, str]]:
        return {c.id: self.grid.labels(c) for c in self.grid.configs}

    def leaderboard(self):
        """One row per configuration in rank order: factor levels, n, mean, std, ci95_low/high,
        test_mean, vs_best.*, counts.*, diagnostics.*, flags and any verdict the board has."""
        pd = _pandas()
        records = []
        for row in self.board().rows:
            rec: dict[str, Any] = {"rank": row.rank, "config_id": row.config_id, **row.labels}
            for f in dataclasses.fields(row):
                if f.name in ("rank", "config_id", "labels", "levels", "per_seed", "test_per_seed"):
                    continue
                _flatten(f.name, getattr(row, f.name), rec)
            records.append(rec)
        return pd.DataFrame.from_records(records)

    def ablation(self) -> dict[str, Any]:
        """The ablation tables, one DataFrame each (empty when a view does not apply)."""
        pd = _pandas()
        ab = self.board().ablation
        main = [
            {"factor": e.factor, "baseline": e.baseline, **_record(lvl)} for e in ab.main_effects for lvl in e.levels
        ]
        ofat = ab.one_at_a_time
        inter = [
            {
                "a": i.a,
                "b": i.b,
                "level_b": lb,
                "level_a": la,
                "mean": m,
                "best_a": i.best_a_by_b.get(lb),
                "depends": i.depends,
            }
            for i in ab.interactions
            for lb, row in i.means.items()
            for la, m in row.items()
        ]
        return {
            "main_effects": pd.DataFrame.from_records(main),
            "one_at_a_time": pd.DataFrame.from_records([_record(r) for r in ofat.rows] if ofat else []),
            "interactions": pd.DataFrame.from_records(inter),
            "regularization": pd.DataFrame.from_records([_record(r) for r in ab.regularization]),
            "optimization": pd.DataFrame.from_records([_record(r) for r in ab.optimization]),
        }

    def _job_frame(self) -> list[dict[str, Any]]:
        labels = self._labels()
        return [{"job_key": j.key, "config_id": j.config.id, **labels[j.config.id], "seed": j.seed} for j in self.grid]

    def jobs(self):
        """One row per job of the grid; status None while pending."""
        pd = _pandas()
        with self._store() as db:
            stored = {r.key: r for r in db.jobs({j.key for j in self.grid})}
            kept = db.weights_kept(stored)
            groups = {k: db.trained_as(k) for k in stored}
        out = []
        for rec in self._job_frame():
            r = stored.get(rec["job_key"])
            group = groups.get(rec["job_key"])
            rec |= {
                "status": r.status.value if r else None,
                "error": r.error if r else None,
                "epochs_run": r.epochs_run if r else None,
                "best_epoch": r.best_epoch if r else None,
                "duration": r.duration if r else None,
                "trained": None if group is None else (f"stacked ({len(group)})" if group else "single"),
                "weights_kept": rec["job_key"] in kept,
            }
            out.append(rec)
        return pd.DataFrame.from_records(out)

    def metrics(self):
        """Every stored final metric, long: job_key, config_id, factors, seed, split, metric, value."""
        pd = _pandas()
        with self._store() as db:
            stored = db.metrics()
        out = []
        for rec in self._job_frame():
            for split, values in stored.get(rec["job_key"], {}).items():
                out += [{**rec, "split": split, "metric": name, "value": v} for name, v in sorted(values.items())]
        return pd.DataFrame.from_records(out)

    def curves(self):
        """Every stored per-epoch curve, long: job_key, config_id, factors, seed, epoch, curve, value."""
        pd = _pandas()
        frame = self._job_frame()
        with self._store() as db:
            curves = db.curves([r["job_key"] for r in frame])
        out = []
        for rec in frame:
            for name, values in curves.get(rec["job_key"], {}).items():
                out += [{**rec, "epoch": e, "curve": name, "value": v} for e, v in enumerate(values, 1)]
        return pd.DataFrame.from_records(out)

    def load_bundle(self, path: str | Path):
        """A bundle written by `recipe export` (runner.outputs.predict.Predictor)."""
        from runner.outputs.predict import load_bundle

        return load_bundle(path)


def _record(obj) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for f in dataclasses.fields(obj):
        _flatten(f.name, getattr(obj, f.name), out)
    return out


def open_study(recipe_path: str | Path, store: str | Path | None = None) -> Study:
    """A recipe and its results store (default: runs/<name>.sqlite beside the recipe)."""
    return Study(recipe_path, store)


def run(
    recipe_path: str | Path,
    store: str | Path | None = None,
    workers: int | None = None,
    threads: int = 1,
    on: str | None = None,
    retry_failed: bool = False,
    max_attempts: int = 2,
    time_limit: float | None = None,
    stack: bool = True,
    mlflow: str | None = None,
    quiet: bool = False,
) -> Study:
    """Train every job of the recipe with no stored result, as `recipe run` does (same
    options, same store, lock and resume), and return the study."""
    import sys

    from runner.evidence.leaderboard import leaderboard
    from runner.execution.planning import plan
    from runner.execution.progress import Progress
    from runner.execution.retention import retain
    from runner.execution.session import Training, check_retry
    from runner.outputs.mlflow_export import RunLogger
    from runner.store import RunnerLock
    from runner.store.database import Store

    study = Study(recipe_path, store)
    recipe, grid = study.recipe, study.grid
    check_retry(grid, retry_failed)
    with Store(study.store_path) as db, RunnerLock(db):  # held over a race's rounds, as recipe run holds it
        train = Training(grid, db, on, workers, threads, max_attempts, time_limit, stack)
        todo = plan(grid, db, retry_failed)
        train.tracker = tracker = RunLogger(mlflow or recipe.tracking.mlflow, grid, db)
        keep = recipe.run.keep_weights

        def progress_for(n: int) -> Progress:
            return Progress(n, grid.rank_by, grid.goal, stream=sys.stderr, live=False, quiet=quiet)

        def note(text: str) -> None:
            if not quiet:
                print(text, file=sys.stderr)

        try:
            train.run(todo.to_run, progress_for, note)
        except KeyboardInterrupt:
            tracker.interrupted()
            raise
        errors = tracker.finish()
        if errors:
            print(f"MLflow export failed for {len(errors)} job(s); retry with recipe export-mlflow", file=sys.stderr)
        retain(grid, db, leaderboard(grid, db), keep)
    return study
