"""Where local worker processes come from, and starting that early.

Workers fork from a server process that has imported torch and the tool once
(``runner.execution.preload``), so a new or replacement worker starts in milliseconds instead of
seconds; where forkserver is not available, fresh interpreters are spawned. Both start clean
of the main process's threads and state.

This module imports nothing heavy. ``recipe run`` starts the server only once its plan asks
for worker processes (execution/sizing.py), and the main process of such a run imports no
torch itself: the server's imports are the run's only ones, and a recipe with an error, a
run with nothing to train or a plan small enough to train in-process starts no server.
"""

from __future__ import annotations

import multiprocessing
import os
import signal
import threading

__all__ = ["default_workers", "start_early", "worker_context"]

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
