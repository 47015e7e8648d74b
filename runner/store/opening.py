"""Opening a results store safely, and saying in words what went wrong with one.

A store path can be a folder, a device, a file under another file, another application's
database, a file on a read-only or full disk; the file can be deleted or replaced while a
run writes to it. Each case becomes a ``StoreError`` (or a subclass) naming the file and
what to do, never a traceback, and never a silent write into the wrong database.
"""

from __future__ import annotations

import contextlib
import errno
import os
import sqlite3
from pathlib import Path
from urllib.parse import quote

from runner.errors import StoreError
from runner.files import describe_kind

__all__ = [
    "StoreGone",
    "StoreReadOnly",
    "check_location",
    "connect",
    "file_identity",
    "make_folder",
    "remove_files",
    "store_failure",
]


class StoreReadOnly(StoreError):
    """The store cannot be written (read-only file, folder or disk)."""


class StoreGone(StoreError):
    """The store file was deleted or replaced while this process had it open."""


def check_location(path: Path) -> None:
    """Refuse a store path that is not a regular file, or lies under something that is not
    a folder, before SQLite (or mkdir) sees it."""
    try:
        info = os.stat(path)
    except (FileNotFoundError, NotADirectoryError):
        info = None
    except OSError as exc:
        raise StoreError(f"cannot use this path as a store ({exc.strerror})", where=str(path)) from None
    if info is None and os.path.islink(path) and not path.resolve().parent.is_dir():
        raise StoreError(
            f"the store path is a symbolic link into a folder that does not exist ({os.readlink(path)})",
            where=str(path),
            hint="Fix or remove the link, or give --store another path",
        )
    if info is not None:
        kind = describe_kind(info.st_mode)
        if kind is not None:
            raise StoreError(
                f"the store path is {kind}", where=str(path), allowed="a results file such as runs/NAME.sqlite"
            )
        return
    for parent in path.absolute().parents:
        if parent.exists():
            if not parent.is_dir():
                raise StoreError(
                    f"the store's folder {parent} is a file, not a folder",
                    where=str(path),
                    hint="Give --store a path inside a folder",
                )
            return


def make_folder(path: Path) -> list[Path]:
    """Create the folder of the store ``path`` and missing parents; the folders it made,
    deepest first (for ``remove_files``)."""
    made = []
    for parent in path.absolute().parents:
        if parent.exists():
            break
        made.append(parent)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise store_failure(exc, path, "creating its folder") from None
    return made


def _uri(path: Path, mode: str, immutable: bool = False) -> str:
    return f"file:{quote(str(path.absolute()))}?mode={mode}" + ("&immutable=1" if immutable else "")


def connect(path: Path, writable: bool, create: bool = True) -> sqlite3.Connection:
    """A connection in autocommit mode. Writable: the file is created if missing, unless
    not ``create``. Read-only: the file must exist; a store in a folder this process cannot
    write (SQLite cannot make its shared-memory file there) is read as an immutable file."""
    mode = ("rwc" if create else "rw") if writable else "ro"
    try:
        conn = sqlite3.connect(_uri(path, mode), uri=True, timeout=30.0, isolation_level=None)
    except sqlite3.Error as exc:
        raise store_failure(exc, path, "opening it") from None
    try:
        conn.execute("SELECT count(*) FROM sqlite_master").fetchone()
        return conn
    except sqlite3.Error as exc:
        conn.close()
        if writable or "unable to open" not in str(exc):
            raise store_failure(exc, path, "opening it") from None
    try:
        conn = sqlite3.connect(_uri(path, "ro", immutable=True), uri=True, isolation_level=None)
        conn.execute("SELECT count(*) FROM sqlite_master").fetchone()
    except sqlite3.Error as exc:
        raise store_failure(exc, path, "opening it") from None
    return conn


def file_identity(path: Path) -> tuple[int, int] | None:
    """(device, inode) of the file at ``path`` now; None if there is none."""
    try:
        info = os.stat(path)
    except OSError:
        return None
    return (info.st_dev, info.st_ino)


def _writable_place(path: Path) -> bool:
    target = path if path.exists() else path.parent
    return os.access(target, os.W_OK) and os.access(path.parent, os.W_OK)


def store_failure(exc: BaseException, path: Path, doing: str) -> StoreError:
    """The StoreError that says what this SQLite or OS error means for the user."""
    name = getattr(exc, "sqlite_errorname", "") or ""
    text = str(exc) if isinstance(exc, sqlite3.Error) else (getattr(exc, "strerror", None) or str(exc))
    where = str(path)
    errno_ = getattr(exc, "errno", None)
    if name.startswith("SQLITE_FULL") or "disk is full" in text or errno_ in (errno.ENOSPC, errno.EDQUOT):
        return StoreError(
            f"the disk holding the store is full ({doing})",
            where=where,
            hint="Free some space, then run the same command again: the results stored before "
            "this are intact and finished jobs are not repeated",
        )
    if name.startswith(("SQLITE_CORRUPT", "SQLITE_NOTADB")):
        return StoreError(
            f"the store file is damaged or not an SQLite database ({text})",
            where=where,
            hint="Restore it from a copy, or give this run a new --store",
        )
    if name.startswith(("SQLITE_BUSY", "SQLITE_LOCKED")):
        return StoreError(
            "another process kept the store locked for 30 s", where=where, hint="Try again when it is done"
        )
    cannot_write = name.startswith(("SQLITE_CANTOPEN", "SQLITE_IOERR")) and not _writable_place(path)
    if name.startswith("SQLITE_READONLY") or errno_ in (errno.EACCES, errno.EPERM, errno.EROFS) or cannot_write:
        return StoreReadOnly(
            f"the store cannot be written: its file, folder or disk is read-only ({doing})",
            where=where,
            hint="Make it writable, or give this run another --store",
        )
    if name.startswith("SQLITE_IOERR"):
        return StoreError(f"the disk reported an error ({doing}: {text})", where=where)
    return StoreError(f"cannot use the store ({doing}: {text})", where=where)


def remove_files(path: Path, folders: list[Path] = ()) -> None:
    """Delete a store file with its write-ahead log and shared-memory files, then those of
    ``folders`` (made for it) that are empty."""
    for name in (path, Path(f"{path}-wal"), Path(f"{path}-shm"), Path(f"{path}-journal")):
        with contextlib.suppress(OSError):  # gone already, or never made (a read-only folder)
            os.remove(name)
    for folder in folders:
        with contextlib.suppress(OSError):
            folder.rmdir()
