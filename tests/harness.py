"""Real processes, real mounts and real stores for the safety tests: a runner started as its
own session, waiting on a store, a small tmpfs (a disk that really fills up) and a read-only
bind mount (a folder the kernel refuses to write). Mounting needs CAP_SYS_ADMIN; without it
the tests that need a mount are skipped and say why."""

from __future__ import annotations

import contextlib
import os
import signal
import sqlite3
import subprocess
import time
from pathlib import Path

import pytest
from conftest import PYTHON, subprocess_env


def start_run(args, stderr=subprocess.PIPE, **env) -> subprocess.Popen:
    """``recipe run ARGS`` in its own session (so a test can signal all of it, or only the
    runner), importing this worktree's code."""
    e = subprocess_env()
    e.update(env)
    return subprocess.Popen(
        [PYTHON, "-m", "runner", "run", *map(str, args)],
        env=e,
        start_new_session=True,
        stdout=subprocess.PIPE,
        stderr=stderr,
        text=True,
    )


def wait_for(predicate, seconds: float = 120) -> bool:
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        if predicate():
            return True
        time.sleep(0.1)
    return False


def query(store: Path, sql: str, args=()):
    """Rows of a read-only query, or None while the store is missing or busy."""
    try:
        with contextlib.closing(sqlite3.connect(f"file:{store}?mode=ro", uri=True, timeout=1)) as c:
            return c.execute(sql, args).fetchall()
    except sqlite3.Error:
        return None


def stored_count(store: Path) -> int:
    rows = query(store, "SELECT count(*) FROM jobs")
    return rows[0][0] if rows else 0


def jobs(store: Path) -> dict:
    """key -> (status, finished time): equal before and after when no job was written again."""
    return {k: (s, f) for k, s, f in query(store, "SELECT key, status, finished FROM jobs") or []}


def lock_row(store: Path):
    rows = query(store, "SELECT value FROM meta WHERE key = 'runner'")
    return rows[0][0] if rows else None


def session_pids(sid: int) -> list[int]:
    """Live (not zombie) processes of a session: the runner, its fork server and workers."""
    out = []
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            fields = (entry / "stat").read_text().rsplit(")", 1)[1].split()
        except OSError:
            continue
        if int(fields[3]) == sid and fields[0] != "Z":  # fields[3]: session id; fields[0]: state
            out.append(int(entry.name))
    return out


def kill_session(proc: subprocess.Popen) -> None:
    with contextlib.suppress(ProcessLookupError):
        os.killpg(proc.pid, signal.SIGKILL)
    with contextlib.suppress(subprocess.TimeoutExpired):
        proc.communicate(timeout=30)


def _mount(*args: str) -> None:
    proc = subprocess.run(["mount", *args], capture_output=True, text=True)
    if proc.returncode != 0:
        pytest.skip(f"needs permission to mount ({proc.stderr.strip() or 'mount failed'})")


def _umount(path: Path) -> None:
    for _ in range(50):  # a process that had files open there may take a moment to go
        if subprocess.run(["umount", str(path)], capture_output=True).returncode == 0:
            return
        time.sleep(0.2)


@contextlib.contextmanager
def small_disk(path: Path, size: str):
    """A tmpfs of ``size`` (e.g. "512k") mounted at ``path``: writes past it fail with ENOSPC."""
    path.mkdir(parents=True, exist_ok=True)
    _mount("-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(path))
    try:
        yield path
    finally:
        _umount(path)


@contextlib.contextmanager
def read_only_view(folder: Path, view: Path):
    """``folder`` seen read-only at ``view`` (a read-only bind mount: EROFS for everyone,
    root included, whose file permissions would not stop it)."""
    view.mkdir(parents=True, exist_ok=True)
    _mount("--bind", str(folder), str(view))
    try:
        if subprocess.run(["mount", "-o", "remount,ro,bind", str(view)], capture_output=True).returncode != 0:
            pytest.skip("needs permission to remount read-only")
        yield view
    finally:
        _umount(view)


def fill(disk: Path, leave: int) -> Path:
    """Fill ``disk`` until about ``leave`` bytes are free; the filler file's path."""
    filler = disk / "filler"
    st = os.statvfs(disk)
    free = st.f_bavail * st.f_frsize
    with open(filler, "wb") as f:
        f.write(b"\0" * max(0, free - leave))
    return filler


def listening_ports(pids: list[int]) -> set[int]:
    """TCP ports on which these processes listen (from /proc: their socket inodes matched
    with the kernel's tables of listening sockets)."""
    inodes = set()
    for pid in pids:
        try:
            for fd in Path(f"/proc/{pid}/fd").iterdir():
                with contextlib.suppress(OSError):
                    target = os.readlink(fd)
                    if target.startswith("socket:["):
                        inodes.add(target[8:-1])
        except OSError:
            continue
    ports = set()
    for table in ("/proc/net/tcp", "/proc/net/tcp6"):
        with contextlib.suppress(OSError), open(table) as f:
            for line in f.readlines()[1:]:
                fields = line.split()
                if fields[3] == "0A" and fields[9] in inodes:  # 0A: LISTEN
                    ports.add(int(fields[1].rsplit(":", 1)[1], 16))
    return ports
