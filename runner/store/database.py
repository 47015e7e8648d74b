"""The results store: one SQLite file per recipe.

Tables: recipes (each recipe text seen), jobs (identity, settings, status, timings, error,
environment, diagnostics), metrics (final metric per split), curves (per-epoch values),
weights (a finished job's trained weights as safetensors bytes, when kept), trained_as
(the keys of the stacked group a job trained in, in order; [] for a job trained alone).
A job's whole result, its weights included, is written in one transaction when it
finishes, so a killed process leaves either the complete result or none of it: never a
half-written weights blob. Only finished jobs are stored.
modules (the source text of each user network file seen, by hash) and job_modules (which
one a job of model.kind = "python" trained: ``Store.job_module``).
race_looks (each look of an adaptive run: who stays, who is dropped and why), lr_probes
(the learning-rate range test's curves).
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import socket
import sqlite3
import time
from collections.abc import Iterable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from runner.errors import StoreError
from runner.store.opening import (
    StoreGone,
    check_location,
    connect,
    file_identity,
    make_folder,
    remove_files,
    store_failure,
)
from runner.training.job import FINISHED, JobResult, Status

__all__ = ["SCHEMA_VERSION", "Store", "StoredJob", "StoredModule"]

SCHEMA_VERSION = 1

_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS recipes (
    hash TEXT PRIMARY KEY, name TEXT NOT NULL, path TEXT, text TEXT NOT NULL, first_seen REAL NOT NULL);
CREATE TABLE IF NOT EXISTS jobs (
    key TEXT PRIMARY KEY, config_id TEXT NOT NULL, seed INTEGER NOT NULL,
    levels TEXT NOT NULL, settings TEXT NOT NULL, recipe_hash TEXT NOT NULL,
    status TEXT NOT NULL, error TEXT, finished REAL NOT NULL, duration REAL NOT NULL,
    epochs_run INTEGER NOT NULL, best_epoch INTEGER, attempts INTEGER NOT NULL DEFAULT 1,
    env TEXT NOT NULL, diagnostics TEXT NOT NULL);
CREATE INDEX IF NOT EXISTS jobs_config ON jobs (config_id);
CREATE TABLE IF NOT EXISTS metrics (
    job_key TEXT NOT NULL REFERENCES jobs(key) ON DELETE CASCADE, split TEXT NOT NULL,
    name TEXT NOT NULL, value REAL, PRIMARY KEY (job_key, split, name));
CREATE TABLE IF NOT EXISTS running (
    key TEXT PRIMARY KEY, pid INTEGER NOT NULL, host TEXT NOT NULL, started REAL NOT NULL);
CREATE TABLE IF NOT EXISTS curves (
    job_key TEXT NOT NULL REFERENCES jobs(key) ON DELETE CASCADE, name TEXT NOT NULL,
    epoch INTEGER NOT NULL, value REAL, PRIMARY KEY (job_key, name, epoch));
CREATE TABLE IF NOT EXISTS weights (
    job_key TEXT PRIMARY KEY REFERENCES jobs(key) ON DELETE CASCADE, format TEXT NOT NULL,
    sha256 TEXT NOT NULL, data BLOB NOT NULL);
CREATE TABLE IF NOT EXISTS trained_as (
    job_key TEXT PRIMARY KEY REFERENCES jobs(key) ON DELETE CASCADE, members TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS modules (
    sha256 TEXT PRIMARY KEY, file TEXT NOT NULL, source TEXT NOT NULL, first_seen REAL NOT NULL);
CREATE TABLE IF NOT EXISTS job_modules (
    job_key TEXT PRIMARY KEY REFERENCES jobs(key) ON DELETE CASCADE,
    sha256 TEXT NOT NULL REFERENCES modules(sha256));
CREATE TABLE IF NOT EXISTS race_looks (
    race TEXT NOT NULL, round INTEGER NOT NULL, look TEXT NOT NULL, PRIMARY KEY (race, round));
CREATE TABLE IF NOT EXISTS lr_probes (
    probe TEXT PRIMARY KEY, optimizer TEXT NOT NULL, result TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS exports (
    uri TEXT NOT NULL, job_key TEXT NOT NULL, run_id TEXT NOT NULL, exported REAL NOT NULL,
    PRIMARY KEY (uri, job_key));
"""


@dataclass(frozen=True)
class StoredJob:
    """A finished job as the store holds it."""

    key: str
    config_id: str
    seed: int
    levels: dict[str, str]  # factor name -> level label
    status: Status
    error: str | None
    duration: float
    epochs_run: int
    best_epoch: int | None
    env: dict[str, Any]
    diagnostics: dict[str, Any]
    recipe_hash: str


@dataclass(frozen=True)
class StoredModule:
    """What rebuilds a job's own network (model.kind = "python"): exec ``source`` as a
    module, take its class ``class_name`` and call it with ``args`` as keyword arguments
    (the tool then initializes and trains it; a trained model's weights are not kept here).
    ``file`` is the path the recipe gave, relative to the recipe; ``sha256`` hashes the
    file's bytes and is part of the job's key."""

    file: str
    class_name: str
    args: dict[str, Any]
    source: str
    sha256: str


def _num(value):
    """SQLite has no NaN: store non-finite numbers as NULL (shown as absent, never as zero)."""
    if value is None:
        return None
    value = float(value)
    return value if value == value and abs(value) != float("inf") else None


APPLICATION = "recipe-runner"  # the meta row that marks a database as this tool's store


class Store:
    """One results database. ``create``: make the file if it is missing (else it must exist);
    ``writable`` (default: ``create``): open it for writing. A database that is not a store
    of this tool is refused unless it is empty; a read-only store opens only for reading."""

    def __init__(self, path: str | Path, create: bool = True, writable: bool | None = None):
        self.path = Path(path)
        self.writable = create if writable is None else writable
        self.lock = None  # the RunnerLock this Store holds, if any (store/lock.py)
        check_location(self.path)
        if not create and not self.path.exists():
            raise StoreError(
                "no results store here yet",
                where=str(self.path),
                hint="Run the recipe first with 'recipe run', or pass --store PATH",
            )
        self.created = not os.path.lexists(self.path)
        self.made = make_folder(self.path) if self.writable and create else []
        try:
            self.conn = connect(self.path, self.writable)
        except BaseException:
            if self.created:
                remove_files(self.path, self.made)
            raise
        self.identity = file_identity(self.path)
        try:
            self._adopt()
        except BaseException:
            self.close()
            if self.created:
                remove_files(self.path, self.made)
            raise

    def _adopt(self) -> None:
        """Check that this is a store of this tool (or empty, then make it one when writable)."""
        try:
            tables = {r[0] for r in self.conn.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
            rows = dict(self.conn.execute("SELECT key, value FROM meta")) if "meta" in tables else {}
        except sqlite3.Error as exc:
            raise store_failure(exc, self.path, "reading it") from None
        if not tables:
            if not self.writable:
                raise StoreError(
                    "no results store here yet (the file is an empty database)",
                    where=str(self.path),
                    hint="Run the recipe first with 'recipe run', or pass --store PATH",
                )
        elif rows.get("application") != APPLICATION and not ("schema" in rows and "jobs" in tables):
            shown = ", ".join(sorted(tables)[:6]) + (f" and {len(tables) - 6} more" if len(tables) > 6 else "")
            raise StoreError(
                "is an SQLite database of some other program, not a results store",
                where=str(self.path),
                value=f"tables {shown}",
                allowed="a results store of this tool, an empty file, or a new path",
                hint="Give --store a new file; this tool does not write into other databases",
            )
        elif not str(rows.get("schema", "")).isdigit():
            raise StoreError(
                "the store's meta row 'schema' is damaged",
                where=str(self.path),
                value=rows.get("schema"),
                allowed=f"the schema version {SCHEMA_VERSION}",
                hint="Restore the store from a copy, or give this run a new --store",
            )
        elif int(rows["schema"]) != SCHEMA_VERSION:
            raise StoreError(f"store schema version {rows['schema']} is not {SCHEMA_VERSION}", where=str(self.path))
        if not self.writable:
            return
        try:
            self.conn.execute("PRAGMA journal_mode=WAL")
            self.conn.execute("PRAGMA synchronous=NORMAL")
            self.conn.executescript(_SCHEMA)
            self.conn.execute("INSERT OR IGNORE INTO meta VALUES ('schema', ?)", (str(SCHEMA_VERSION),))
            self.conn.execute("INSERT OR REPLACE INTO meta VALUES ('application', ?)", (APPLICATION,))
        except sqlite3.Error as exc:
            raise store_failure(exc, self.path, "preparing it") from None
        self.conn.execute("PRAGMA foreign_keys=ON")

    def close(self) -> None:
        self.conn.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    def remove_if_unused(self) -> bool:
        """Close and delete the file if this Store created it and nothing was stored in it
        (a command that failed before its first result leaves no empty store behind)."""
        if not self.created or not self.same_file():
            return False
        from runner.store.lock import RunnerLock

        try:
            other = RunnerLock.holder(self)
            if other is not None and self.lock is None:
                return False  # another run came in meanwhile and holds it: it is theirs now
            used = any(self.conn.execute(f"SELECT 1 FROM {table} LIMIT 1").fetchone() for table in ("jobs", "exports"))
        except sqlite3.Error:
            return False
        if used:
            return False
        if self.lock is not None:
            self.lock.release()
        self.close()
        remove_files(self.path, self.made)
        return True

    def same_file(self) -> bool:
        """Whether the path still names the file this Store opened (not deleted or replaced)."""
        return self.identity is not None and file_identity(self.path) == self.identity

    def _check_same_file(self) -> None:
        if not self.same_file():
            now = "is gone" if file_identity(self.path) is None else "is now a different file"
            raise StoreGone(
                f"the results store was deleted or replaced while in use (the path {now}); "
                "results can no longer be kept in it, so this run stopped",
                where=str(self.path),
                hint="Run the same command again to redo what is missing",
            )

    @contextmanager
    def writing(self, doing: str, transaction: bool = True) -> Iterator[sqlite3.Connection]:
        """A write to the store: on the file it opened (checked before and after), in one
        transaction, with SQLite's errors turned into StoreErrors (disk full, read-only...)."""
        self._check_same_file()
        c = self.conn
        try:
            if transaction:
                c.execute("BEGIN IMMEDIATE")
            yield c
            if transaction:
                c.execute("COMMIT")
        except sqlite3.Error as exc:
            self._rollback()
            raise store_failure(exc, self.path, doing) from None
        except BaseException:
            self._rollback()
            raise
        self._check_same_file()

    def _rollback(self) -> None:
        # SQLite has already rolled back after some errors (a full disk): no second rollback then
        if self.conn.in_transaction:
            with contextlib.suppress(sqlite3.Error):
                self.conn.execute("ROLLBACK")

    def _need_lock(self) -> None:
        if self.lock is None:
            raise RuntimeError("internal: results are written only while holding the runner lock")

    def remember_recipe(self, recipe) -> None:
        self._need_lock()
        with self.writing("recording the recipe", transaction=False) as c:
            c.execute(
                "INSERT OR IGNORE INTO recipes VALUES (?, ?, ?, ?, ?)",
                (recipe.hash, recipe.name, str(recipe.path), recipe.text, time.time()),
            )

    def finished_keys(self, statuses: Iterable[Status] = FINISHED) -> set[str]:
        statuses = tuple(s.value for s in statuses)
        marks = ",".join("?" * len(statuses))
        rows = self.conn.execute(f"SELECT key FROM jobs WHERE status IN ({marks})", statuses)
        return {r[0] for r in rows}

    def write_result(
        self, job, labels: dict, recipe_hash: str, result: JobResult, attempts: int = 1, weights: bytes | None = None
    ) -> None:
        """The whole result in one transaction (metrics and curves replace any earlier try);
        ``weights``: the trained weights as safetensors bytes, kept beside it."""
        self._need_lock()
        diagnostics = {**result.diagnostics, "notes": result.notes} if result.notes else result.diagnostics
        with self.writing("writing a job's result") as c:
            c.execute("DELETE FROM jobs WHERE key = ?", (job.key,))
            c.execute("DELETE FROM running WHERE key = ?", (job.key,))
            c.execute(
                "INSERT INTO jobs (key, config_id, seed, levels, settings, recipe_hash, status, error,"
                " finished, duration, epochs_run, best_epoch, attempts, env, diagnostics)"
                " VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?,?,?)",
                (
                    job.key,
                    job.config.id,
                    job.seed,
                    json.dumps(labels),
                    json.dumps(job.config.settings.to_dict(), sort_keys=True),
                    recipe_hash,
                    Status(result.status).value,
                    result.error,
                    time.time(),
                    result.duration,
                    result.epochs_run,
                    result.best_epoch,
                    attempts,
                    json.dumps(result.env, sort_keys=True),
                    json.dumps(diagnostics, sort_keys=True),
                ),
            )
            module = getattr(job.config, "module", None)
            if module is not None:
                c.execute(
                    "INSERT OR IGNORE INTO modules VALUES (?, ?, ?, ?)",
                    (module.sha256, module.file, module.source, time.time()),
                )
                c.execute("INSERT OR REPLACE INTO job_modules VALUES (?, ?)", (job.key, module.sha256))
            c.executemany(
                "INSERT INTO metrics VALUES (?,?,?,?)",
                [(job.key, split, name, _num(v)) for split, vals in result.metrics.items() for name, v in vals.items()],
            )
            c.executemany(
                "INSERT INTO curves VALUES (?,?,?,?)",
                [(job.key, name, e + 1, _num(v)) for name, vals in result.curves.items() for e, v in enumerate(vals)],
            )
            c.execute("INSERT INTO trained_as VALUES (?, ?)", (job.key, json.dumps(list(result.group))))
            if weights is not None:
                c.execute(
                    "INSERT INTO weights VALUES (?, 'safetensors', ?, ?)",
                    (job.key, hashlib.sha256(weights).hexdigest(), weights),
                )

    def jobs(self, keys: Iterable[str] | None = None) -> list[StoredJob]:
        rows = self.conn.execute(
            "SELECT key, config_id, seed, levels, status, error, duration, epochs_run, best_epoch,"
            " env, diagnostics, recipe_hash FROM jobs"
        ).fetchall()
        wanted = set(keys) if keys is not None else None
        out = []
        for r in rows:
            if wanted is not None and r[0] not in wanted:
                continue
            try:
                out.append(self._job(r))
            except (ValueError, TypeError, RecursionError):  # json and Status raise ValueError subclasses
                raise StoreError(
                    "a stored job's record is damaged",
                    where=str(self.path),
                    value=r[0],
                    hint="Restore the store from a copy, or run with --fresh to recompute this grid",
                ) from None
        return out

    @staticmethod
    def _job(r) -> StoredJob:
        return StoredJob(
            key=r[0],
            config_id=r[1],
            seed=r[2],
            levels=json.loads(r[3]),
            status=Status(r[4]),
            error=r[5],
            duration=r[6],
            epochs_run=r[7],
            best_epoch=r[8],
            env=json.loads(r[9]),
            diagnostics=json.loads(r[10]),
            recipe_hash=r[11],
        )

    def job_module(self, key: str) -> StoredModule | None:
        """The network a stored job of model.kind = "python" trained, or None (the tool's own
        network, or no such job)."""
        row = self.conn.execute(
            "SELECT j.settings, m.file, m.source, m.sha256 FROM job_modules x JOIN jobs j ON j.key = x.job_key"
            " JOIN modules m ON m.sha256 = x.sha256 WHERE x.job_key = ?",
            (key,),
        ).fetchone()
        if row is None:
            return None
        model = json.loads(row[0])["model"]
        return StoredModule(
            file=row[1], class_name=model["class_name"], args=model["args"], source=row[2], sha256=row[3]
        )

    def latest_recipe(self) -> tuple[str, str] | None:
        """(text, path) of the recipe this store saw last, or None."""
        row = self.conn.execute("SELECT text, path FROM recipes ORDER BY first_seen DESC LIMIT 1").fetchone()
        return None if row is None else (row[0], row[1])

    def meta(self, key: str) -> str | None:
        row = self.conn.execute("SELECT value FROM meta WHERE key = ?", (key,)).fetchone()
        return None if row is None else row[0]

    def set_meta(self, key: str, value: str) -> None:
        with self.writing(f"setting {key}", transaction=False) as c:
            c.execute("INSERT OR REPLACE INTO meta VALUES (?, ?)", (key, value))

    def exported_keys(self, uri: str) -> set[str]:
        """Jobs already logged to this MLflow tracking URI."""
        return {r[0] for r in self.conn.execute("SELECT job_key FROM exports WHERE uri = ?", (uri,))}

    def record_export(self, uri: str, key: str, run_id: str) -> None:
        with self.writing("recording an export", transaction=False) as c:
            c.execute("INSERT OR REPLACE INTO exports VALUES (?, ?, ?, ?)", (uri, key, run_id, time.time()))

    def metrics(self) -> dict[str, dict[str, dict[str, float | None]]]:
        out: dict = {}
        for key, split, name, value in self.conn.execute("SELECT job_key, split, name, value FROM metrics"):
            out.setdefault(key, {}).setdefault(split, {})[name] = value
        return out

    def curves(self, keys: Iterable[str]) -> dict[str, dict[str, list]]:
        out: dict = {}
        keys = list(keys)
        for i in range(0, len(keys), 500):
            chunk = keys[i : i + 500]
            marks = ",".join("?" * len(chunk))
            q = (
                f"SELECT job_key, name, epoch, value FROM curves WHERE job_key IN ({marks}) "
                "ORDER BY job_key, name, epoch"
            )
            for key, name, _epoch, value in self.conn.execute(q, chunk):
                out.setdefault(key, {}).setdefault(name, []).append(value)
        return out

    def mark_running(self, key: str) -> None:
        self._need_lock()
        with self.writing("marking a job as running", transaction=False) as c:
            c.execute(
                "INSERT OR REPLACE INTO running VALUES (?, ?, ?, ?)",
                (key, os.getpid(), socket.gethostname(), time.time()),
            )

    def running_keys(self) -> set[str]:
        """Jobs marked running by a runner that still holds the store; stale marks are ignored."""
        from runner.store.lock import RunnerLock

        if RunnerLock.holder(self) is None:
            return set()
        return {r[0] for r in self.conn.execute("SELECT key FROM running")}

    def forget(self, keys: Iterable[str]) -> int:
        """Delete the stored results of these jobs (for --fresh)."""
        self._need_lock()
        keys = list(keys)
        n = 0
        with self.writing("deleting results") as c:
            for i in range(0, len(keys), 500):
                chunk = keys[i : i + 500]
                marks = ",".join("?" * len(chunk))
                n += c.execute(f"DELETE FROM jobs WHERE key IN ({marks})", chunk).rowcount
                c.execute(f"DELETE FROM running WHERE key IN ({marks})", chunk)
        return n

    def weights(self, key: str) -> bytes | None:
        """The kept weights of a job (safetensors bytes), or None when none are kept or the
        bytes do not match the hash written with them (then the job is retrained)."""
        row = self.conn.execute("SELECT sha256, data FROM weights WHERE job_key = ?", (key,)).fetchone()
        if row is None or hashlib.sha256(row[1]).hexdigest() != row[0]:
            return None
        return bytes(row[1])

    def weights_kept(self, keys: Iterable[str] | None = None) -> dict[str, int]:
        """Job key -> bytes of its kept weights (of these keys, or all)."""
        rows = self.conn.execute("SELECT job_key, length(data) FROM weights").fetchall()
        wanted = set(keys) if keys is not None else None
        return {k: n for k, n in rows if wanted is None or k in wanted}

    def drop_weights(self, keys: Iterable[str]) -> int:
        """Delete the kept weights of these jobs (their results stay); how many were kept."""
        keys = list(keys)
        n = 0
        with self.writing("dropping kept weights") as c:
            for i in range(0, len(keys), 500):
                chunk = keys[i : i + 500]
                marks = ",".join("?" * len(chunk))
                n += c.execute(f"DELETE FROM weights WHERE job_key IN ({marks})", chunk).rowcount
        return n

    def trained_as(self, key: str) -> tuple[str, ...] | None:
        """The keys of the stacked group this job trained in, in order (() when it trained
        alone), or None when the store does not know (stored before this was recorded)."""
        row = self.conn.execute("SELECT members FROM trained_as WHERE job_key = ?", (key,)).fetchone()
        return None if row is None else tuple(json.loads(row[0]))

    def settings_of(self, key: str) -> tuple[dict[str, Any], int] | None:
        """(resolved settings in their plain form, seed) of a stored job, or None."""
        row = self.conn.execute("SELECT settings, seed FROM jobs WHERE key = ?", (key,)).fetchone()
        return None if row is None else (json.loads(row[0]), row[1])

    def record_race_look(self, race: str, round_: int, look: dict[str, Any]) -> None:
        """One look of race ``race`` (its decisions as plain JSON), in one statement: a killed
        run leaves a look whole or not at all. A look is decided once and never rewritten."""
        with self.writing("recording a race look", transaction=False) as c:
            c.execute(
                "INSERT OR IGNORE INTO race_looks VALUES (?, ?, ?)", (race, round_, json.dumps(look, sort_keys=True))
            )

    def race_looks(self, race: str) -> list[dict[str, Any]]:
        """The stored looks of race ``race``, in round order."""
        rows = self.conn.execute("SELECT look FROM race_looks WHERE race = ? ORDER BY round", (race,))
        return [json.loads(r[0]) for r in rows]

    def forget_race(self, race: str) -> None:
        """Delete a race's looks (``recipe run --fresh``)."""
        with self.writing("forgetting a race", transaction=False) as c:
            c.execute("DELETE FROM race_looks WHERE race = ?", (race,))

    def record_lr_probe(self, probe: str, optimizer: str, result: dict[str, Any]) -> None:
        """A learning-rate range test's curve and suggestion, under the probe's identity."""
        with self.writing("recording a learning-rate probe", transaction=False) as c:
            c.execute(
                "INSERT OR REPLACE INTO lr_probes VALUES (?, ?, ?)",
                (probe, optimizer, json.dumps(result, sort_keys=True)),
            )

    def lr_probes(self, probes: Iterable[str]) -> dict[str, dict[str, Any]]:
        """The stored range tests among ``probes``, by identity."""
        wanted = set(probes)
        rows = self.conn.execute("SELECT probe, result FROM lr_probes").fetchall()
        return {p: json.loads(r) for p, r in rows if p in wanted}

    def integrity(self) -> str:
        return self.conn.execute("PRAGMA integrity_check").fetchone()[0]
