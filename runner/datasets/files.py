"""Reading the user's files: regular files only, never more than a bound, never echoed.

A recipe may name any path (absolute paths are allowed: users need them), so a path can
be a device (/dev/zero never ends), a FIFO (opening it waits for a writer), a directory or
a file far larger than memory. ``read_limited`` opens without blocking, checks with fstat
that it holds a regular file and that its size is within the bound, and reads at most the
bound. Error messages name the file and the bound, never its contents.
"""

from __future__ import annotations

import os
import stat
from pathlib import Path

from runner.errors import DataError
from runner.files import describe_kind

__all__ = ["MAX_DATA_BYTES", "read_limited", "show_bytes"]

# The whole dataset is held in memory and sent to every worker: a bound far above the
# tool's intended sizes (small tabular and image sets) that still fails fast on a mistake.
MAX_DATA_BYTES = 2 * 2**30


def show_bytes(n: int) -> str:
    """A byte count for messages: 2 GiB, 512 MiB, 3.1 KiB."""
    for unit, size in (("GiB", 2**30), ("MiB", 2**20), ("KiB", 2**10)):
        if n >= size:
            value = n / size
            return f"{value:.0f} {unit}" if value == int(value) else f"{value:.1f} {unit}"
    return f"{n} bytes"


def read_limited(path: Path, limit: int, *, key: str | None, shown: str, error=DataError) -> bytes:
    """The bytes of the regular file at ``path``, refusing anything else or anything larger
    than ``limit``. ``shown`` is how the path appears in messages (as the user wrote it): the
    value of ``key``, or where the error is when there is no key. ``error``: the UserError
    class to raise."""

    def refuse(problem: str, **fields):
        if key is None:
            return error(problem, where=shown, **fields)
        return error(problem, key=key, value=shown, **fields)

    try:
        # O_NONBLOCK: opening a FIFO for reading would otherwise wait for a writer forever.
        fd = os.open(path, os.O_RDONLY | os.O_NONBLOCK | getattr(os, "O_CLOEXEC", 0))
    except FileNotFoundError:
        raise refuse("file not found") from None
    except IsADirectoryError:
        raise refuse("is a directory, not a file") from None
    except OSError as exc:
        raise refuse(f"cannot open the file ({exc.strerror})") from None
    try:
        info = os.fstat(fd)
        if not stat.S_ISREG(info.st_mode):
            raise refuse(f"is {describe_kind(info.st_mode)}, not a regular file", allowed="a regular file")
        if info.st_size > limit:
            raise refuse(
                f"the file is {show_bytes(info.st_size)}, larger than the {show_bytes(limit)} this tool reads",
                hint="Use a smaller file (fewer rows or columns)",
            )
        chunks, total = [], 0
        while True:
            chunk = os.read(fd, min(2**24, limit + 1 - total))
            if not chunk:
                break
            chunks.append(chunk)
            total += len(chunk)
            if total > limit:  # the file grew while being read
                raise refuse(f"the file is larger than the {show_bytes(limit)} this tool reads")
        return b"".join(chunks)
    except OSError as exc:
        raise refuse(f"cannot read the file ({exc.strerror})") from None
    finally:
        os.close(fd)
