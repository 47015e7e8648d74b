"""Export stored jobs to MLflow: one run per job, under one parent run for the grid.

The SQLite store stays the source of truth: an export that fails loses nothing and can be
retried (``recipe export-mlflow``); the store remembers which jobs reached which tracking
URI, so a retry sends only what is missing. Per run: params = the resolved settings (dotted
paths) and the seed; metrics = per-epoch curves (step = epoch) and the final metrics
("val.accuracy", ...); tags = job key, configuration id, seed, status.
"""

from __future__ import annotations

import contextlib
import json
import os
import time

from runner.errors import UserError
from runner.recipe.grid import Grid
from runner.recipe.settings import Settings
from runner.store.database import Store, StoredJob
from runner.training.job import Status

__all__ = ["Exporter", "RunLogger", "export_all"]


def _flat(settings: Settings) -> dict[str, str]:
    return {
        path: json.dumps(list(value)) if isinstance(value, (list, tuple)) else str(value)
        for path, value in settings.flat().items()
    }


@contextlib.contextmanager
def _one_quick_try():
    """The tracking check tries once with a short timeout (MLflow's defaults retry an
    unreachable server for minutes); settings the user made in the environment win."""
    bounds = {"MLFLOW_HTTP_REQUEST_MAX_RETRIES": "0", "MLFLOW_HTTP_REQUEST_TIMEOUT": "10"}
    added = [name for name in bounds if name not in os.environ]
    os.environ.update({name: bounds[name] for name in added})
    try:
        yield
    finally:
        for name in added:
            os.environ.pop(name, None)


class Exporter:
    def __init__(self, uri: str, grid: Grid, store: Store):
        try:
            from mlflow.tracking import MlflowClient
        except ImportError:
            raise UserError(
                "MLflow export needs mlflow-skinny (and SQLAlchemy, Alembic for sqlite:// URIs)",
                key="--mlflow",
                value=uri,
                hint='Install them with: python -m pip install -c constraints.txt -e ".[mlflow]"',
            ) from None
        import logging

        for name in ("mlflow", "alembic"):
            logging.getLogger(name).setLevel(logging.WARNING)
        self.uri, self.grid, self.store = uri, grid, store
        try:
            self.client = MlflowClient(tracking_uri=uri)
            with _one_quick_try():
                self.client.search_experiments(max_results=1)  # fail here, before any job runs
        except Exception as exc:
            raise UserError(
                f"cannot use this MLflow tracking URI ({type(exc).__name__}: {exc})",
                key="--mlflow",
                value=uri,
                allowed="a reachable tracking URI, e.g. sqlite:///mlflow.db or http://host:5000",
            ) from None
        self._parent: str | None = None
        self._experiment: str | None = None

    def _parent_run(self) -> str:
        if self._parent:
            return self._parent
        name = f"recipe/{self.grid.recipe.name}"
        exp = self.client.get_experiment_by_name(name)
        self._experiment = exp.experiment_id if exp else self.client.create_experiment(name)
        key = f"mlflow_parent:{self.uri}:{self.grid.recipe.name}"
        known = self.store.meta(key)
        if known is None:
            parent = self.client.create_run(
                self._experiment,
                run_name=f"grid {self.grid.recipe.name}",
                tags={
                    "recipe.name": self.grid.recipe.name,
                    "recipe.kind": "grid",
                    "recipe.hash": self.grid.recipe.hash,
                },
            )
            self.store.set_meta(key, parent.info.run_id)
            self._parent = parent.info.run_id
        else:
            self._parent = known
        return self._parent

    def exported(self) -> set[str]:
        return self.store.exported_keys(self.uri)

    def export(self, job, stored: StoredJob, metrics: dict, curves: dict) -> str:
        from mlflow.entities import Metric, Param, RunTag

        parent = self._parent_run()
        labels = ", ".join(f"{v}" for v in self.grid.labels(job.config).values()) or "base"
        run = self.client.create_run(
            self._experiment,
            run_name=f"{labels} / seed {job.seed}",
            tags={
                "mlflow.parentRunId": parent,
                "recipe.job_key": job.key,
                "recipe.config_id": job.config.id,
                "recipe.seed": str(job.seed),
                "recipe.status": stored.status.value,
                "recipe.name": self.grid.recipe.name,
            },
        )
        run_id = run.info.run_id
        now = int(time.time() * 1000)
        params = [Param(k, v) for k, v in sorted(_flat(job.config.settings).items())]
        params.append(Param("seed", str(job.seed)))
        points = []
        for name, values in curves.items():
            points += [Metric(name, float(v), now, epoch) for epoch, v in enumerate(values, 1) if v is not None]
        for split, vals in metrics.items():
            points += [Metric(f"{split}.{n}", float(v), now, 0) for n, v in vals.items() if v is not None]
        tags = [RunTag("recipe.error", stored.error)] if stored.error else []
        for i in range(0, max(len(params), 1), 100):
            self.client.log_batch(run_id, params=params[i : i + 100])
        for i in range(0, len(points), 1000):
            self.client.log_batch(run_id, metrics=points[i : i + 1000])
        if tags:
            self.client.log_batch(run_id, tags=tags)
        self.client.set_terminated(run_id, status="FINISHED" if stored.status is Status.DONE else "FAILED")
        self.store.record_export(self.uri, job.key, run_id)
        return run_id


def export_all(uri: str, grid: Grid, store: Store) -> tuple[int, int, list[str]]:
    """Export every stored job of the grid not yet at ``uri``: (sent, already there, errors)."""
    exporter = Exporter(uri, grid, store)
    done = exporter.exported()
    stored = {r.key: r for r in store.jobs({j.key for j in grid})}
    todo = [j for j in grid if j.key in stored and j.key not in done]
    all_metrics = store.metrics()
    curves = store.curves([j.key for j in todo])
    sent, errors = 0, []
    for job in todo:
        try:
            exporter.export(job, stored[job.key], all_metrics.get(job.key, {}), curves.get(job.key, {}))
            sent += 1
        except Exception as exc:  # the store keeps the result; the export can be retried
            errors.append(f"{job.key}: {type(exc).__name__}: {exc}")
            if len(errors) >= 3 and sent == 0:
                break  # the tracking store is unusable; say so rather than try every job
    return sent, len(done & set(stored)), errors


class RunLogger:
    """MLflow logging beside a run: each stored job is logged as it arrives; after a first
    failure the rest waits for the catch-up in ``finish``. Failures never touch the store."""

    def __init__(self, uri: str | None, grid: Grid, store: Store):
        self.uri, self.grid, self.store = uri, grid, store
        self.exporter = Exporter(uri, grid, store) if uri else None
        self.failed = False

    def stored(self, job, result) -> None:
        if self.exporter is None or self.failed:
            return
        try:
            row = self.store.jobs([job.key])[0]
            self.exporter.export(
                job, row, self.store.metrics().get(job.key, {}), self.store.curves([job.key]).get(job.key, {})
            )
        except Exception:
            self.failed = True

    def finish(self) -> list[str] | None:
        """Log whatever is still missing; the errors (empty: all logged), None without MLflow."""
        if self.exporter is None:
            return None
        return export_all(self.uri, self.grid, self.store)[2]
