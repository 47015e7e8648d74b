"""Export stored jobs to MLflow: one run per job, under one parent run for the grid.

The SQLite store stays the source of truth: an export that fails loses nothing and can be
retried (``recipe export-mlflow``). What the tracking store already holds is read once per
export (one search of the experiment's runs): finished job runs are skipped, and a job run
left unfinished by a killed export is deleted and sent again, so a retry neither repeats
nor half-keeps anything.

Per run: params = the resolved settings (dotted paths) and the seed; tags = job key,
configuration id, seed, status; metrics under one naming, ``<split>.<name>``, for the
per-epoch curves (step = epoch: ``train.loss``, ``val.loss``, ``val.<rank metric>``, and
``lr``) and the final metrics (``val.accuracy``, ``test.accuracy``, ...), the finals logged
at the job's last epoch, so MLflow's latest value of a metric is the job's result (under
early stopping, the restored best epoch's). Each job goes in one create, one batch per
1000 values and one close. The parent run is FINISHED once every job of the grid is
exported, KILLED when the run that logged it was interrupted, RUNNING while a run is on.
"""

from __future__ import annotations

import contextlib
import json
import math
import os
import signal
import threading
import time

from runner.errors import UserError
from runner.recipe.grid import Grid
from runner.recipe.settings import Settings
from runner.store.database import Store
from runner.training.job import Status

__all__ = ["Exporter", "RunLogger", "export_all", "metric_name", "recorded_complete"]

_BATCH = 1000  # MLflow's limit on values in one log_batch call
_SPLITS = ("train", "val", "test")


def metric_name(curve: str) -> str:
    """A stored curve's name in the export's one naming: "val_f1_macro" -> "val.f1_macro"."""
    head, _, rest = curve.partition("_")
    return f"{head}.{rest}" if head in _SPLITS and rest else curve


def _flat(settings: Settings) -> dict[str, str]:
    return {
        path: json.dumps(list(value)) if isinstance(value, (list, tuple)) else str(value)
        for path, value in settings.flat().items()
    }


def _finite(v) -> bool:
    return v is not None and math.isfinite(v)


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
        self._there: dict[str, tuple[str, str]] | None = None  # job key -> (run id, status)

    def _experiment_id(self) -> str:
        if self._experiment is None:
            name = f"recipe/{self.grid.recipe.name}"
            exp = self.client.get_experiment_by_name(name)
            self._experiment = exp.experiment_id if exp else self.client.create_experiment(name)
        return self._experiment

    def _parent_run(self) -> str:
        """The grid's parent run (made once per store and URI), marked RUNNING while jobs come in."""
        if self._parent:
            return self._parent
        key = f"mlflow_parent:{self.uri}:{self.grid.recipe.name}"
        known = self.store.meta(key)
        if known is None:
            parent = self.client.create_run(
                self._experiment_id(),
                run_name=f"grid {self.grid.recipe.name}",
                tags={
                    "recipe.name": self.grid.recipe.name,
                    "recipe.kind": "grid",
                    "recipe.hash": self.grid.recipe.hash,
                },
            )
            self.store.set_meta(key, parent.info.run_id)
            known = parent.info.run_id
        else:
            self.client.update_run(known, status="RUNNING")
        self._parent = known
        return known

    def begin(self) -> None:
        """Open (or reopen as RUNNING) the grid's parent run."""
        self._parent_run()

    def there(self) -> dict[str, tuple[str, str]]:
        """Job runs the tracking store holds for this recipe: key -> (run id, status); read once."""
        if self._there is None:
            found: dict[str, tuple[str, str]] = {}
            token = None
            while True:
                page = self.client.search_runs([self._experiment_id()], max_results=1000, page_token=token)
                for run in page:
                    key = run.data.tags.get("recipe.job_key")  # the grid's parent run has none
                    if key is not None and run.info.lifecycle_stage == "active":
                        found[key] = (run.info.run_id, run.info.status)
                token = page.token
                if not token:
                    break
            self._there = found
        return self._there

    def exported(self) -> set[str]:
        """Jobs whose run is complete in the tracking store."""
        return {k for k, (_, status) in self.there().items() if status != "RUNNING"}

    def export(self, job, status: Status, error: str | None, metrics: dict, curves: dict, epochs: int) -> str:
        """One job as one run: create (with its tags), its params and metrics in batches, close."""
        from mlflow.entities import Metric, Param

        parent = self._parent_run()
        stale = self.there().pop(job.key, None)
        if stale is not None:  # left unfinished by a killed export: replace it
            self.client.delete_run(stale[0])
        labels = ", ".join(f"{v}" for v in self.grid.labels(job.config).values()) or "base"
        tags = {
            "mlflow.parentRunId": parent,
            "recipe.kind": "job",
            "recipe.job_key": job.key,
            "recipe.config_id": job.config.id,
            "recipe.seed": str(job.seed),
            "recipe.status": status.value,
            "recipe.name": self.grid.recipe.name,
        }
        if error:
            tags["recipe.error"] = error[:5000]
        run_id = self.client.create_run(
            self._experiment_id(), run_name=f"{labels} / seed {job.seed}", tags=tags
        ).info.run_id
        now = int(time.time() * 1000)
        params = [Param(k, v) for k, v in sorted(_flat(job.config.settings).items())] + [Param("seed", str(job.seed))]
        points, last = [], {}
        for name, values in curves.items():
            key = metric_name(name)
            steps = [(e, float(v)) for e, v in enumerate(values, 1) if _finite(v)]
            points += [Metric(key, v, now, e) for e, v in steps]
            if steps:
                last[key] = steps[-1]
        for split, vals in metrics.items():
            for n, v in vals.items():
                key = f"{split}.{n}"
                if _finite(v) and last.get(key) != (epochs, float(v)):  # not a repeat of the curve's last point
                    points.append(Metric(key, float(v), now + 1, epochs))
        room = _BATCH - len(params)
        self.client.log_batch(run_id, params=params, metrics=points[:room])
        for i in range(room, len(points), _BATCH):
            self.client.log_batch(run_id, metrics=points[i : i + _BATCH])
        self.client.set_terminated(run_id, status="FINISHED" if status is Status.DONE else "FAILED")
        self.store.record_export(self.uri, job.key, run_id)
        self._there[job.key] = (run_id, "FINISHED")
        return run_id

    def close_parent(self, status: str) -> None:
        """Mark the grid's parent run FINISHED, FAILED or KILLED (when there is one)."""
        key = f"mlflow_parent:{self.uri}:{self.grid.recipe.name}"
        parent = self._parent or self.store.meta(key)
        if parent is not None:
            self.client.set_terminated(parent, status=status)
            self.store.set_meta(_closed_key(self.uri, self.grid), status)


def _closed_key(uri: str, grid: Grid) -> str:
    return f"mlflow_parent_status:{uri}:{grid.recipe.name}"


def recorded_complete(uri: str, grid: Grid, store: Store) -> int | None:
    """The number of jobs when this store's own record says every job of the grid reached
    ``uri`` and its parent run was closed FINISHED (then an export has nothing to send and
    need not import MLflow, whose import and store set-up take most of such a call); else None.
    A sqlite tracking file that no longer exists is never taken as holding anything."""
    keys = {j.key for j in grid}
    stored = {r.key for r in store.jobs(keys)}
    if stored != keys or not keys <= store.exported_keys(uri) or store.meta(_closed_key(uri, grid)) != "FINISHED":
        return None
    if uri.startswith("sqlite:///"):
        from pathlib import Path

        if not Path(uri[len("sqlite:///") :]).exists():
            return None
    return len(keys)


@contextlib.contextmanager
def _interrupt_after():
    """Hold a Ctrl-C (SIGINT) until the block ends, then raise it: an MLflow call cut short
    leaves a half-made run or a parent whose id was never recorded."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    caught = []
    previous = signal.signal(signal.SIGINT, lambda *_: caught.append(True))
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, previous)
    if caught:
        raise KeyboardInterrupt


def export_all(uri: str, grid: Grid, store: Store, exporter: Exporter | None = None) -> tuple[int, int, list[str]]:
    """Export every stored job of the grid not yet at ``uri``: (sent, already there, errors).
    The parent run is closed FINISHED when every job of the grid is then exported."""
    from runner.store.lock import RunnerLock

    if exporter is None and (known := recorded_complete(uri, grid, store)) is not None:
        return 0, known, []
    exporter = exporter or Exporter(uri, grid, store)
    done = exporter.exported()
    stored = {r.key: r for r in store.jobs({j.key for j in grid})}
    todo = [j for j in grid if j.key in stored and j.key not in done]
    all_metrics = store.metrics() if todo else {}
    curves = store.curves([j.key for j in todo])
    sent, errors = 0, []
    for job in todo:
        row = stored[job.key]
        try:
            exporter.export(
                job, row.status, row.error, all_metrics.get(job.key, {}), curves.get(job.key, {}), row.epochs_run
            )
            sent += 1
        except Exception as exc:  # the store keeps the result; the export can be retried
            errors.append(f"{job.key}: {type(exc).__name__}: {exc}")
            if len(errors) >= 3 and sent == 0:
                break  # the tracking store is unusable; say so rather than try every job
    complete = not errors and len(stored) == len(grid)
    if complete:
        exporter.close_parent("FINISHED")
    elif not errors and RunnerLock.holder(store) is None and (sent or done):
        exporter.close_parent("KILLED")  # the study stopped before its end; nothing is running it
    return sent, len(done & set(stored)), errors


class RunLogger:
    """MLflow logging beside a run: finished jobs are logged in batches as they arrive (every
    ``every`` jobs or ``seconds``), from the results in hand (no store reads); after a first
    failure the rest waits for the catch-up in ``finish``. Failures never touch the store."""

    def __init__(self, uri: str | None, grid: Grid, store: Store, every: int = 16, seconds: float = 10.0):
        self.uri, self.grid, self.store = uri, grid, store
        self.exporter = Exporter(uri, grid, store) if uri else None
        self.failed = False
        self.every, self.seconds = every, seconds
        self._waiting: list = []
        self._since = time.monotonic()
        if self.exporter is not None:  # the grid's run is there from the start, so a stop can close it
            try:
                self.exporter.begin()
            except Exception:
                self.failed = True

    def stored(self, job, result) -> None:
        if self.exporter is None or self.failed:
            return
        self._waiting.append((job, result))
        if len(self._waiting) >= self.every or time.monotonic() - self._since > self.seconds:
            self._flush()

    def _flush(self) -> None:
        """Log the waiting jobs, each whole: a Ctrl-C during one takes effect after it."""
        self._since = time.monotonic()
        while self._waiting and not self.failed:
            job, r = self._waiting[0]
            try:
                with _interrupt_after():
                    if job.key not in self.exporter.exported():
                        self.exporter.export(job, Status(r.status), r.error, r.metrics, r.curves, r.epochs_run)
                    self._waiting.pop(0)
            except Exception:
                self.failed = True

    def interrupted(self) -> None:
        """The run was stopped part-way: close the parent KILLED. Jobs not yet logged stay in
        the store for the next run or `recipe export-mlflow`; a Ctrl-C is not kept waiting."""
        if self.exporter is None:
            return
        try:
            with _interrupt_after():
                self.exporter.close_parent("KILLED")
        except Exception:  # the results are safe in the store; export-mlflow can catch up
            pass

    def finish(self) -> list[str] | None:
        """Log whatever is still missing; the errors (empty: all logged), None without MLflow."""
        if self.exporter is None:
            return None
        if not self.failed:
            self._flush()
        return export_all(self.uri, self.grid, self.store, self.exporter if not self.failed else None)[2]
