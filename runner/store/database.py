"""The results store: one SQLite file per recipe.

Tables: recipes (each recipe text seen), jobs (identity, settings, status, timings, error,
environment, diagnostics), metrics (final metric per split), curves (per-epoch values),
race_looks (each look of an adaptive run: who stays, who is dropped and why), lr_probes
(the learning-rate range test's curves).
A job's whole result is written in one transaction when it finishes, so a killed process
leaves either the complete result or none of it. Only finished jobs are stored.
"""

from __future__ import annotations

import json
import os
import socket
import sqlite3
import time
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from runner.errors import StoreError
from runner.training.job import FINISHED, JobResult, Status

__all__ = ["SCHEMA_VERSION", "Store", "StoredJob"]

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


def _num(value):
    """SQLite has no NaN: store non-finite numbers as NULL (shown as absent, never as zero)."""
    if value is None:
        return None
    value = float(value)
    return value if value == value and abs(value) != float("inf") else None


class Store:
    def __init__(self, path: str | Path, create: bool = True):
        self.path = Path(path)
        if not create and not self.path.exists():
            raise StoreError(
                "no results store here yet",
                where=str(self.path),
                hint="Run the recipe first with 'recipe run', or pass --store PATH",
            )
        self.path.parent.mkdir(parents=True, exist_ok=True)
        try:
            self.conn = sqlite3.connect(self.path, timeout=30.0, isolation_level=None)
            self.conn.execute("PRAGMA journal_mode=WAL")
            self.conn.execute("PRAGMA foreign_keys=ON")
            self.conn.execute("PRAGMA synchronous=NORMAL")
            self.conn.executescript(_SCHEMA)
            row = self.conn.execute("SELECT value FROM meta WHERE key='schema'").fetchone()
        except sqlite3.DatabaseError as exc:
            raise StoreError(f"not a usable results store ({exc})", where=str(self.path)) from None
        if row is None:
            self.conn.execute("INSERT OR IGNORE INTO meta VALUES ('schema', ?)", (str(SCHEMA_VERSION),))
        elif int(row[0]) != SCHEMA_VERSION:
            raise StoreError(f"store schema version {row[0]} is not {SCHEMA_VERSION}", where=str(self.path))

    def close(self) -> None:
        self.conn.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    def remember_recipe(self, recipe) -> None:
        self.conn.execute(
            "INSERT OR IGNORE INTO recipes VALUES (?, ?, ?, ?, ?)",
            (recipe.hash, recipe.name, str(recipe.path), recipe.text, time.time()),
        )

    def finished_keys(self, statuses: Iterable[Status] = FINISHED) -> set[str]:
        statuses = tuple(s.value for s in statuses)
        marks = ",".join("?" * len(statuses))
        rows = self.conn.execute(f"SELECT key FROM jobs WHERE status IN ({marks})", statuses)
        return {r[0] for r in rows}

    def write_result(self, job, labels: dict, recipe_hash: str, result: JobResult, attempts: int = 1) -> None:
        """The whole result in one transaction (metrics and curves replace any earlier try)."""
        c = self.conn
        diagnostics = {**result.diagnostics, "notes": result.notes} if result.notes else result.diagnostics
        c.execute("BEGIN IMMEDIATE")
        try:
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
            c.executemany(
                "INSERT INTO metrics VALUES (?,?,?,?)",
                [(job.key, split, name, _num(v)) for split, vals in result.metrics.items() for name, v in vals.items()],
            )
            c.executemany(
                "INSERT INTO curves VALUES (?,?,?,?)",
                [(job.key, name, e + 1, _num(v)) for name, vals in result.curves.items() for e, v in enumerate(vals)],
            )
            c.execute("COMMIT")
        except BaseException:
            c.execute("ROLLBACK")
            raise

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
            out.append(
                StoredJob(
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
            )
        return out

    def latest_recipe(self) -> tuple[str, str] | None:
        """(text, path) of the recipe this store saw last, or None."""
        row = self.conn.execute("SELECT text, path FROM recipes ORDER BY first_seen DESC LIMIT 1").fetchone()
        return None if row is None else (row[0], row[1])

    def meta(self, key: str) -> str | None:
        row = self.conn.execute("SELECT value FROM meta WHERE key = ?", (key,)).fetchone()
        return None if row is None else row[0]

    def set_meta(self, key: str, value: str) -> None:
        self.conn.execute("INSERT OR REPLACE INTO meta VALUES (?, ?)", (key, value))

    def exported_keys(self, uri: str) -> set[str]:
        """Jobs already logged to this MLflow tracking URI."""
        return {r[0] for r in self.conn.execute("SELECT job_key FROM exports WHERE uri = ?", (uri,))}

    def record_export(self, uri: str, key: str, run_id: str) -> None:
        self.conn.execute("INSERT OR REPLACE INTO exports VALUES (?, ?, ?, ?)", (uri, key, run_id, time.time()))

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
        self.conn.execute(
            "INSERT OR REPLACE INTO running VALUES (?, ?, ?, ?)", (key, os.getpid(), socket.gethostname(), time.time())
        )

    def running_keys(self) -> set[str]:
        """Jobs marked running by a runner that still holds the store; stale marks are ignored."""
        from runner.store.lock import RunnerLock

        if RunnerLock.holder(self) is None:
            return set()
        return {r[0] for r in self.conn.execute("SELECT key FROM running")}

    def forget(self, keys: Iterable[str]) -> int:
        """Delete the stored results of these jobs (for --fresh)."""
        keys = list(keys)
        c = self.conn
        c.execute("BEGIN IMMEDIATE")
        try:
            n = 0
            for i in range(0, len(keys), 500):
                chunk = keys[i : i + 500]
                marks = ",".join("?" * len(chunk))
                n += c.execute(f"DELETE FROM jobs WHERE key IN ({marks})", chunk).rowcount
                c.execute(f"DELETE FROM running WHERE key IN ({marks})", chunk)
            c.execute("COMMIT")
        except BaseException:
            c.execute("ROLLBACK")
            raise
        return n

    def record_race_look(self, race: str, round_: int, look: dict[str, Any]) -> None:
        """One look of race ``race`` (its decisions as plain JSON), in one statement: a killed
        run leaves a look whole or not at all. A look is decided once and never rewritten."""
        self.conn.execute(
            "INSERT OR IGNORE INTO race_looks VALUES (?, ?, ?)", (race, round_, json.dumps(look, sort_keys=True))
        )

    def race_looks(self, race: str) -> list[dict[str, Any]]:
        """The stored looks of race ``race``, in round order."""
        rows = self.conn.execute("SELECT look FROM race_looks WHERE race = ? ORDER BY round", (race,))
        return [json.loads(r[0]) for r in rows]

    def forget_race(self, race: str) -> None:
        """Delete a race's looks (``recipe run --fresh``)."""
        self.conn.execute("DELETE FROM race_looks WHERE race = ?", (race,))

    def record_lr_probe(self, probe: str, optimizer: str, result: dict[str, Any]) -> None:
        """A learning-rate range test's curve and suggestion, under the probe's identity."""
        self.conn.execute(
            "INSERT OR REPLACE INTO lr_probes VALUES (?, ?, ?)", (probe, optimizer, json.dumps(result, sort_keys=True))
        )

    def lr_probes(self, probes: Iterable[str]) -> dict[str, dict[str, Any]]:
        """The stored range tests among ``probes``, by identity."""
        wanted = set(probes)
        rows = self.conn.execute("SELECT probe, result FROM lr_probes").fetchall()
        return {p: json.loads(r) for p, r in rows if p in wanted}

    def integrity(self) -> str:
        return self.conn.execute("PRAGMA integrity_check").fetchone()[0]
