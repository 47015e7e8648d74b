"""The `recipe` console script: the command line's own imports (click, the CLI module) run
inside a Ctrl-C guard, so an interrupt in the first moments prints one line and exits 130
instead of a traceback. Only the standard library is imported before the guard.

A command that imported torch ends through ``_exit_now``: the exit handlers run and the
streams are flushed as in a normal exit, but the interpreter's teardown of every module is
skipped (with torch loaded it took about 0.5 s of the user's wait on these machines, and
the command has closed its store and files by then; bench/RESULTS.md)."""

from __future__ import annotations

import sys

__all__ = ["main"]


def main() -> None:
    try:
        from runner.cli.app import main as cli_main
    except KeyboardInterrupt:
        sys.stderr.write("\nInterrupted before anything ran.\n")
        sys.exit(130)
    try:
        cli_main()
    except SystemExit as exc:
        _exit_now(exc.code)
        raise
    _exit_now(0)


def _exit_now(code: object) -> None:
    """Exit at once with ``code`` (SystemExit's meaning: None is 0, a text is printed and
    is 1) after the exit handlers have run; returns (for a normal exit) unless torch is
    loaded and no other non-daemon thread is alive."""
    import atexit
    import contextlib
    import os
    import threading

    run_handlers = getattr(atexit, "_run_exitfuncs", None)
    others = [t for t in threading.enumerate() if t is not threading.main_thread() and not t.daemon]
    if "torch" not in sys.modules or run_handlers is None or others:
        return
    if code is None:
        status = 0
    elif isinstance(code, int):
        status = code
    else:
        sys.stderr.write(f"{code}\n")
        status = 1
    run_handlers()
    try:
        sys.stdout.flush()
    except (OSError, ValueError):  # output lost (a closed pipe, a full disk): as Python itself says it
        status = status or 120
        with contextlib.suppress(OSError, ValueError):
            sys.stderr.write("error: the command's output could not be written in full\n")
    with contextlib.suppress(OSError, ValueError):
        sys.stderr.flush()
    os._exit(status)
