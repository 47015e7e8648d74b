"""Where local worker processes come from, and starting that early.

Workers fork from a server process that has imported torch and the tool once
(``runner._preload``), so a new or replacement worker starts in milliseconds instead of
seconds; where forkserver is not available, fresh interpreters are spawned. Both start clean
of the main process's threads and state.

This module imports nothing heavy, so ``recipe run`` can start the server before it imports
torch itself: the server's imports (about 3 s on a 2-core machine) then overlap with the main
process's own start-up, data loading and planning instead of following them.
"""
from __future__ import annotations

import multiprocessing
import os
import sys

__all__ = ["worker_context", "start_early", "wants_workers", "default_workers"]

_PRELOAD = ["runner._preload"]


def worker_context():
    if "forkserver" in multiprocessing.get_all_start_methods():
        ctx = multiprocessing.get_context("forkserver")
        ctx.set_forkserver_preload(_PRELOAD)
        return ctx
    return multiprocessing.get_context("spawn")


def start_early() -> None:
    """Start the fork server now, in the background (returns at once); the pool finds it
    running. Where there is no fork server, nothing to do."""
    if worker_context().get_start_method() == "forkserver":
        from multiprocessing import forkserver

        forkserver.ensure_running()


def default_workers() -> int:
    """One worker per core this process may use."""
    if hasattr(os, "sched_getaffinity"):
        return max(1, len(os.sched_getaffinity(0)))
    return max(1, os.cpu_count() or 1)


def wants_workers(recipe_path: str, workers: int | None, on: str | None) -> bool:
    """Whether ``recipe run`` will use local worker processes, read cheaply from the options
    and the recipe's [run] table. Any doubt (an unreadable recipe, odd values) says no: the
    recipe's full validation comes later and reports what is wrong."""
    if sys.version_info >= (3, 11):
        import tomllib
    else:
        import tomli as tomllib
    try:
        with open(recipe_path, "rb") as f:
            run = tomllib.load(f).get("run", {})
    except Exception:
        return False
    if not isinstance(run, dict):
        return False
    where = on or run.get("on", "local")
    count = workers or run.get("workers") or default_workers()
    return where == "local" and isinstance(count, int) and count > 1
