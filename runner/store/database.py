"""The results store: one SQLite file per recipe.

Tables: recipes (each recipe text seen), jobs (identity, settings, status, timings, error,
environment, diagnostics), metrics (final metric per split), curves (per-epoch values).
A job's whole result is written in one transaction when it finishes, so a killed process
leaves either the complete result or none of it. Only finished jobs are stored.
"""
from __future__ import annotations

import json
import os
import socket
import sqlite3
import threading
import time
from pathlib import Path
from typing import Iterable

from runner.errors import StoreError
from runner.training.job import JobResult

__all__ = ["Store", "RunnerLock", "FINISHED", "SCHEMA_VERSION", "STALE_AFTER"]

STALE_AFTER = 60.0  # seconds without a heartbeat after which a runner's lock is abandoned

SCHEMA_VERSION = 1
FINISHED = ("done", "diverged", "failed", "timeout")

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
"""


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
            raise StoreError("no results store here yet", where=str(self.path),
                             hint="Run the recipe first with 'recipe run', or pass --store PATH")
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
        self.conn.execute("INSERT OR IGNORE INTO recipes VALUES (?, ?, ?, ?, ?)",
                          (recipe.hash, recipe.name, str(recipe.path), recipe.text, time.time()))

    def finished_keys(self, statuses: Iterable[str] = FINISHED) -> set[str]:
        statuses = tuple(statuses)
        marks = ",".join("?" * len(statuses))
        rows = self.conn.execute(f"SELECT key FROM jobs WHERE status IN ({marks})", statuses)
        return {r[0] for r in rows}

    def write_result(self, job, labels: dict, recipe_hash: str, result: JobResult,
                     attempts: int = 1) -> None:
        """The whole result in one transaction (metrics and curves replace any earlier try)."""
        c = self.conn
        c.execute("BEGIN IMMEDIATE")
        try:
            c.execute("DELETE FROM jobs WHERE key = ?", (job.key,))
            c.execute("DELETE FROM running WHERE key = ?", (job.key,))
            c.execute(
                "INSERT INTO jobs (key, config_id, seed, levels, settings, recipe_hash, status, error,"
                " finished, duration, epochs_run, best_epoch, attempts, env, diagnostics)"
                " VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?,?,?)",
                (job.key, job.config.id, job.seed, json.dumps(labels), json.dumps(job.config.settings,
                 sort_keys=True, default=list), recipe_hash, result.status, result.error, time.time(),
                 result.duration, result.epochs_run, result.best_epoch, attempts,
                 json.dumps(result.env, sort_keys=True), json.dumps(result.diagnostics, sort_keys=True)))
            c.executemany("INSERT INTO metrics VALUES (?,?,?,?)",
                          [(job.key, split, name, _num(v)) for split, vals in result.metrics.items()
                           for name, v in vals.items()])
            c.executemany("INSERT INTO curves VALUES (?,?,?,?)",
                          [(job.key, name, e + 1, _num(v)) for name, vals in result.curves.items()
                           for e, v in enumerate(vals)])
            c.execute("COMMIT")
        except BaseException:
            c.execute("ROLLBACK")
            raise

    def jobs(self, keys: Iterable[str] | None = None) -> list[dict]:
        rows = self.conn.execute(
            "SELECT key, config_id, seed, levels, status, error, duration, epochs_run, best_epoch,"
            " env, diagnostics, recipe_hash FROM jobs").fetchall()
        wanted = set(keys) if keys is not None else None
        out = []
        for r in rows:
            if wanted is not None and r[0] not in wanted:
                continue
            out.append({"key": r[0], "config_id": r[1], "seed": r[2], "levels": json.loads(r[3]),
                        "status": r[4], "error": r[5], "duration": r[6], "epochs_run": r[7],
                        "best_epoch": r[8], "env": json.loads(r[9]), "diagnostics": json.loads(r[10]),
                        "recipe_hash": r[11]})
        return out

    def metrics(self) -> dict[str, dict[str, dict[str, float | None]]]:
        out: dict = {}
        for key, split, name, value in self.conn.execute("SELECT job_key, split, name, value FROM metrics"):
            out.setdefault(key, {}).setdefault(split, {})[name] = value
        return out

    def curves(self, keys: Iterable[str]) -> dict[str, dict[str, list]]:
        out: dict = {}
        keys = list(keys)
        for i in range(0, len(keys), 500):
            chunk = keys[i:i + 500]
            q = ("SELECT job_key, name, epoch, value FROM curves WHERE job_key IN (%s) "
                 "ORDER BY job_key, name, epoch" % ",".join("?" * len(chunk)))
            for key, name, _epoch, value in self.conn.execute(q, chunk):
                out.setdefault(key, {}).setdefault(name, []).append(value)
        return out

    def mark_running(self, key: str) -> None:
        self.conn.execute("INSERT OR REPLACE INTO running VALUES (?, ?, ?, ?)",
                          (key, os.getpid(), socket.gethostname(), time.time()))

    def running_keys(self) -> set[str]:
        """Jobs marked running by a runner that still holds the store; stale marks are ignored."""
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
                chunk = keys[i:i + 500]
                marks = ",".join("?" * len(chunk))
                n += c.execute(f"DELETE FROM jobs WHERE key IN ({marks})", chunk).rowcount
                c.execute(f"DELETE FROM running WHERE key IN ({marks})", chunk)
            c.execute("COMMIT")
        except BaseException:
            c.execute("ROLLBACK")
            raise
        return n

    def integrity(self) -> str:
        return self.conn.execute("PRAGMA integrity_check").fetchone()[0]


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


_MINE = ("DELETE FROM meta WHERE key = 'runner' AND json_extract(value, '$.pid') = ?"
         " AND json_extract(value, '$.host') = ?")


class RunnerLock:
    """One runner per store at a time: a second ``recipe run`` on the same store refuses.

    The holder writes a heartbeat every few seconds from a background thread. A lock whose
    process is gone (same host) or whose heartbeat is older than STALE_AFTER seconds was left
    by a killed runner and is taken over, and its "running" marks are cleared.
    """

    def __init__(self, store: Store):
        self.path = store.path
        self.store = store
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self.me = {"pid": os.getpid(), "host": socket.gethostname(), "started": time.time()}

    @staticmethod
    def holder(store: Store) -> dict | None:
        row = store.conn.execute("SELECT value FROM meta WHERE key = 'runner'").fetchone()
        if row is None:
            return None
        info = json.loads(row[0])
        stale = time.time() - info.get("heartbeat", 0) > STALE_AFTER
        gone = info.get("host") == socket.gethostname() and not _alive(info.get("pid", -1))
        return None if (stale or gone) else info

    def acquire(self) -> None:
        c = self.store.conn
        c.execute("BEGIN IMMEDIATE")
        try:
            other = self.holder(self.store)
            if other is not None and other.get("pid") != os.getpid():
                c.execute("ROLLBACK")
                raise StoreError(
                    f"another 'recipe run' (pid {other['pid']} on {other['host']}) is using this store",
                    where=str(self.path),
                    hint="Wait for it to finish, or give this run its own --store; a killed run's lock "
                         f"is recovered automatically (at once on the same host, else after {STALE_AFTER:g} s)")
            c.execute("DELETE FROM running")
            c.execute("INSERT OR REPLACE INTO meta VALUES ('runner', ?)",
                      (json.dumps({**self.me, "heartbeat": time.time()}),))
            c.execute("COMMIT")
        except StoreError:
            raise
        except BaseException:
            c.execute("ROLLBACK")
            raise
        self._thread = threading.Thread(target=self._beat, daemon=True)
        self._thread.start()

    def _beat(self) -> None:
        conn = sqlite3.connect(self.path, timeout=30.0)
        try:
            while not self._stop.wait(5.0):
                with conn:
                    conn.execute(_MINE.replace("DELETE FROM meta", "UPDATE meta SET value = ?"),
                                 (json.dumps({**self.me, "heartbeat": time.time()}), *self._who()))
        finally:
            conn.close()

    def release(self) -> None:
        self._stop.set()
        if self._thread:
            self._thread.join(timeout=10)
        if self.store.conn.execute(_MINE, self._who()).rowcount:
            self.store.conn.execute("DELETE FROM running")

    def _who(self) -> tuple:
        return (self.me["pid"], self.me["host"])

    def __enter__(self):
        self.acquire()
        return self

    def __exit__(self, *exc):
        self.release()
