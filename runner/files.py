"""Reading the files a user names and writing the files a user asks for, without surprises.

A path given on the command line or in a recipe can be anything: a directory, a FIFO that
blocks the reader forever, /dev/zero that never ends, a symlink loop, a folder that does not
exist, a read-only disk or /dev/full. Every such case becomes a ``UserError`` naming the path
and what would do, never a traceback, a hang or a process that eats the machine's memory.
"""

from __future__ import annotations

import contextlib
import errno
import os
import stat
from pathlib import Path

from runner.errors import UserError

__all__ = ["OutputError", "describe_kind", "read_bounded", "read_head", "regular_file", "write_output"]


class OutputError(UserError):
    """A file the user asked for could not be written."""


def describe_kind(mode: int) -> str | None:
    """What a non-regular file is, in words; None for a regular file."""
    if stat.S_ISREG(mode):
        return None
    if stat.S_ISDIR(mode):
        return "a directory"
    if stat.S_ISFIFO(mode):
        return "a FIFO (named pipe)"
    if stat.S_ISCHR(mode) or stat.S_ISBLK(mode):
        return "a device"
    if stat.S_ISSOCK(mode):
        return "a socket"
    return "not a regular file"


def regular_file(path: str | Path, what: str, error: type[UserError] = UserError) -> os.stat_result:
    """The stat of ``path`` if it is a regular file (symlinks followed); ``error`` (a
    UserError class) naming what it is otherwise. Checked before anything opens it:
    opening a FIFO blocks, reading a device can go on forever."""
    try:
        info = os.stat(path)
    except FileNotFoundError:
        raise error(f"{what} not found", where=str(path)) from None
    except OSError as exc:
        raise error(f"cannot read {what} ({exc.strerror})", where=str(path)) from None
    kind = describe_kind(info.st_mode)
    if kind is not None:
        raise error(f"{what} is {kind}", where=str(path), allowed="a regular file")
    return info


def read_bounded(path: str | Path, limit: int, what: str, error: type[UserError] = UserError) -> bytes:
    """The bytes of a regular file of at most ``limit`` bytes; ``error`` otherwise. Read with
    a bound as well (a file can grow, or lie about its size, after the check)."""
    info = regular_file(path, what, error)
    too_big = error(
        f"{what} is larger than the limit of {limit:,} bytes",
        where=str(path),
        hint="Check the path: this is not the file you meant",
    )
    if info.st_size > limit:
        raise too_big
    data = read_head(path, limit + 1, what, error)
    if len(data) > limit:
        raise too_big
    return data


def read_head(path: str | Path, size: int, what: str, error: type[UserError] = UserError) -> bytes:
    """At most the first ``size`` bytes of a regular file."""
    regular_file(path, what, error)
    try:
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0))
        with os.fdopen(fd, "rb") as f:
            return f.read(size)
    except OSError as exc:
        raise error(f"cannot read {what} ({exc.strerror})", where=str(path)) from None


_WRITE_HINTS = {
    errno.ENOENT: "Create the folder first, or choose another path",
    errno.ENOTDIR: "A part of the path is a file, not a folder; choose another path",
    errno.EISDIR: "Give a file name, not a folder",
    errno.EACCES: "Choose a folder you may write to",
    errno.EPERM: "Choose a folder you may write to",
    errno.EROFS: "That disk is mounted read-only; choose another path",
    errno.ENOSPC: "The disk is full; free some space or choose another disk",
    errno.EDQUOT: "Your disk quota is used up; free some space or choose another disk",
}


def write_output(path: str | Path, text: str, key: str = "--out") -> None:
    """Write ``text`` to ``path`` (UTF-8). A file this call created and could not finish is
    removed again, so a failed write leaves no truncated report that looks complete; an
    existing file (or /dev/stdout) is written in place, not replaced."""
    path = Path(path)
    existed = os.path.lexists(path)
    try:
        with open(path, "w", encoding="utf-8") as f:
            f.write(text)
    except OSError as exc:
        if not existed and path.is_file():
            with contextlib.suppress(OSError):
                os.remove(path)
        reason = exc.strerror or str(exc)
        raise OutputError(
            f"cannot write the file ({reason})",
            where=str(path),
            key=key,
            hint=_WRITE_HINTS.get(exc.errno or 0),
        ) from None
