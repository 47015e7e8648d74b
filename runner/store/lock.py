"""One runner per store: the lock a ``recipe run`` holds while it writes into a store."""

from __future__ import annotations

import json
import os
import socket
import sqlite3
import threading
import time

from runner.errors import StoreError
from runner.store.database import Store
from runner.store.opening import connect, file_identity

__all__ = ["STALE_AFTER", "RunnerLock", "process_start"]

STALE_AFTER = 60.0  # seconds without a heartbeat after which another host's lock is abandoned
BEAT_EVERY = 5.0  # seconds between heartbeats


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OverflowError, ValueError):
        return pid > 0
    return True


def process_start(pid: int) -> str | None:
    """When process ``pid`` started, as the kernel counts it (Linux: clock ticks since boot,
    field 22 of /proc/PID/stat); None where unknown. With the pid it names one process: a
    pid reused by a later process has another start time."""
    try:
        with open(f"/proc/{pid}/stat", "rb") as f:
            text = f.read().decode("ascii", "replace")
        return text.rsplit(")", 1)[1].split()[19]
    except (OSError, IndexError):
        return None


_MINE = (
    "DELETE FROM meta WHERE key = 'runner' AND json_valid(value)"
    " AND json_extract(value, '$.pid') = ? AND json_extract(value, '$.host') = ?"
)


def _decode(text: str) -> dict | None:
    """The lock row's fields, or None if the row is damaged (not a JSON object with a pid)."""
    try:
        info = json.loads(text)
    except (ValueError, TypeError):
        return None
    if not isinstance(info, dict) or not isinstance(info.get("pid"), int) or not isinstance(info.get("host"), str):
        return None
    return info


class RunnerLock:
    """One runner per store at a time: a second ``recipe run`` on the same store refuses.

    The holder writes a heartbeat every few seconds from a background thread. On the same
    host a lock is held exactly while its process lives (a suspended runner, Ctrl-Z or
    SIGSTOP, keeps it; a killed one loses it at once; a reused pid is told apart by its
    start time). A lock from another host, where the process cannot be seen, is abandoned
    when its heartbeat is older than STALE_AFTER seconds. A damaged lock row holds nothing.
    Taking over a lock clears the "running" marks its runner left.

    Nesting is allowed: a RunnerLock on a Store that already holds one does nothing, so a
    command can take the lock before it plans and the executor's own lock is a no-op.
    """

    def __init__(self, store: Store, command: str = "recipe run"):
        self.path = store.path
        self.store = store
        self.nested = False
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        pid = os.getpid()
        self.me = {
            "pid": pid,
            "host": socket.gethostname(),
            "started": time.time(),
            "start": process_start(pid),
            "command": command,  # named to whoever is refused
        }

    @staticmethod
    def holder(store: Store) -> dict | None:
        row = store.conn.execute("SELECT value FROM meta WHERE key = 'runner'").fetchone()
        info = None if row is None else _decode(row[0])
        if info is None:
            return None
        if info["host"] == socket.gethostname():
            if not _alive(info["pid"]):
                return None
            start = info.get("start")
            return None if start is not None and start != process_start(info["pid"]) else info
        heartbeat = info.get("heartbeat")
        fresh = isinstance(heartbeat, (int, float)) and time.time() - heartbeat <= STALE_AFTER
        return info if fresh else None

    def acquire(self) -> None:
        if self.store.lock is not None:
            self.nested = True
            return
        with self.store.writing("taking the runner lock") as c:
            other = self.holder(self.store)
            if other is not None and other.get("pid") != os.getpid():
                raise StoreError(
                    f"another {other.get('command', 'recipe run')} (pid {other['pid']} on {other['host']}) "
                    "is using this store",
                    where=str(self.path),
                    hint="Wait for it to finish, or give this run its own --store; a killed run's lock "
                    f"is recovered automatically (at once on the same host, else after {STALE_AFTER:g} s)",
                )
            c.execute("DELETE FROM running")
            c.execute(
                "INSERT OR REPLACE INTO meta VALUES ('runner', ?)", (json.dumps({**self.me, "heartbeat": time.time()}),)
            )
        self.store.lock = self
        self._thread = threading.Thread(target=self._beat, daemon=True)
        self._thread.start()

    def _beat(self) -> None:
        """Heartbeats until released. A store that can no longer be written (deleted, full,
        read-only) stops them quietly: the main thread reports that at its next write."""
        try:
            conn = connect(self.path, writable=True, create=False)
        except StoreError:
            return
        try:
            while not self._stop.wait(BEAT_EVERY):
                if file_identity(self.path) != self.store.identity:
                    return
                with conn:
                    conn.execute(
                        _MINE.replace("DELETE FROM meta", "UPDATE meta SET value = ?"),
                        (json.dumps({**self.me, "heartbeat": time.time()}), *self._who()),
                    )
        except sqlite3.Error:
            return
        finally:
            conn.close()

    def release(self) -> None:
        if self.nested or self.store.lock is not self:
            return
        self._stop.set()
        if self._thread:
            self._thread.join(timeout=10)
        self.store.lock = None
        try:
            with self.store.writing("releasing the runner lock") as c:
                if c.execute(_MINE, self._who()).rowcount:
                    c.execute("DELETE FROM running")
        except StoreError:
            pass  # a store that is gone or full keeps a stale lock, which the next run recovers

    def _who(self) -> tuple:
        return (self.me["pid"], self.me["host"])

    def __enter__(self):
        self.acquire()
        return self

    def __exit__(self, *exc):
        self.release()
