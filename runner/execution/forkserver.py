"""Where local worker processes come from, and starting that early.

Workers fork from a server process that has imported torch and the tool once
(``runner.execution.preload``), so a new or replacement worker starts in milliseconds instead of
seconds; where forkserver is not available, fresh interpreters are spawned. Both start clean
of the main process's threads and state.

This module imports nothing heavy, and neither does validating a recipe, so ``recipe run``
starts the server as soon as the recipe is valid and before it imports torch itself: the
server's imports (about 2.5 s on a 2-core machine) then overlap with the main process's own
imports, data loading and planning instead of following them, and a recipe with an error
starts no server at all.
"""

from __future__ import annotations

import multiprocessing
import os
import signal
import threading
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from runner.recipe.loader import RunSettings

__all__ = ["default_workers", "start_early", "wants_workers", "worker_context"]

_PRELOAD = ["runner.execution.preload"]


def worker_context():
    if "forkserver" in multiprocessing.get_all_start_methods():
        ctx = multiprocessing.get_context("forkserver")
        ctx.set_forkserver_preload(_PRELOAD)
        return ctx
    return multiprocessing.get_context("spawn")


def start_early() -> None:
    """Start the fork server now, in the background (returns at once); the pool finds it
    running. Where there is no fork server, nothing to do.

    The server starts with SIGINT blocked, a mask a new process inherits through exec (the
    resource tracker starts the same way; once the server runs, _preload ignores SIGINT):
    Ctrl-C reaches the whole process group and the main process alone decides what it
    means, and a server interrupted while it starts up would print a traceback on the
    user's terminal. In this process the signal is only held back for the moment of the
    spawn, then delivered."""
    if worker_context().get_start_method() != "forkserver":
        return
    from multiprocessing import forkserver

    if threading.current_thread() is not threading.main_thread():
        forkserver.ensure_running()  # the mask is per thread: only the main one gets Ctrl-C
        return
    from multiprocessing import resource_tracker

    resource_tracker.ensure_running()  # first: it unblocks SIGINT after starting its own process
    signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGINT})
    try:
        forkserver.ensure_running()
    finally:
        signal.pthread_sigmask(signal.SIG_UNBLOCK, {signal.SIGINT})


def default_workers() -> int:
    """One worker per core this process may use."""
    if hasattr(os, "sched_getaffinity"):
        return max(1, len(os.sched_getaffinity(0)))
    return max(1, os.cpu_count() or 1)


def wants_workers(workers: int | None, on: str | None, run: RunSettings) -> bool:
    """Whether ``recipe run`` will use local worker processes: from its options and the
    recipe's validated [run] table (the option wins)."""
    where = on or run.on
    return where == "local" and (workers or run.workers or default_workers()) > 1
