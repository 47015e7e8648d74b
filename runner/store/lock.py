"""One runner per store: the lock a ``recipe run`` holds while it trains into a store."""

from __future__ import annotations

import json
import os
import socket
import sqlite3
import threading
import time

from runner.errors import StoreError
from runner.store.database import Store

__all__ = ["STALE_AFTER", "RunnerLock"]

STALE_AFTER = 60.0  # seconds without a heartbeat after which a runner's lock is abandoned


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


_MINE = (
    "DELETE FROM meta WHERE key = 'runner' AND json_extract(value, '$.pid') = ? AND json_extract(value, '$.host') = ?"
)


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
                    f"is recovered automatically (at once on the same host, else after {STALE_AFTER:g} s)",
                )
            c.execute("DELETE FROM running")
            c.execute(
                "INSERT OR REPLACE INTO meta VALUES ('runner', ?)", (json.dumps({**self.me, "heartbeat": time.time()}),)
            )
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
                    conn.execute(
                        _MINE.replace("DELETE FROM meta", "UPDATE meta SET value = ?"),
                        (json.dumps({**self.me, "heartbeat": time.time()}), *self._who()),
                    )
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
