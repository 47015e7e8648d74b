"""Imported once by the worker fork server, before any worker forks from it.

Everything a worker needs is imported here once, so every worker, and every replacement for a
worker that died, starts in milliseconds with it already done: torch, the worker loop, the
stacked path, and what numpy loads only on first use (numpy.random and numpy.ma: about 0.1 s
on a first job's clock otherwise). scikit-learn is not needed: the splits are drawn by
datasets/partition.py, and bundled data sets are read from scikit-learn's files by
datasets/bundled.py. What torch.optim imports on first use is left to the workers that run
single jobs (executors.ready_for): stacked groups never need it. tests/test_startup.py
checks that a worker's first job imports nothing.
"""

import atexit
import contextlib
import os
import signal
import sys

# Ctrl-C reaches the whole process group; the main process decides what it means. The server
# starts with it blocked (forkserver.start_early); from here on it is ignored as well.
signal.signal(signal.SIGINT, signal.SIG_IGN)

_SERVER = os.getpid()


def _in_fork_server() -> bool:
    """Whether this import is the fork server's (multiprocessing.forkserver.main imports the
    preload modules): anywhere else, importing this module must not change how a process ends."""
    frame = sys._getframe(1)
    while frame is not None:
        if frame.f_code.co_name == "main" and frame.f_globals.get("__name__") == "multiprocessing.forkserver":
            return True
        frame = frame.f_back  # type: ignore[assignment]
    return False


def _exit_now() -> None:
    """The server ends when the runner has gone. Registered before torch is imported, this
    handler runs after torch's own and then skips the teardown of every module (about 0.5 s
    with torch loaded): until the server exits it holds the runner's stdout and stderr, so a
    caller reading them through a pipe would wait that long for the end of the output."""
    if os.getpid() != _SERVER:  # a worker forked from the server ends its own way
        return
    for stream in (sys.stdout, sys.stderr):
        with contextlib.suppress(OSError, ValueError):
            stream.flush()
    os._exit(0)


QUICK_EXIT = _in_fork_server()  # True in the fork server only (tests/test_startup.py reads it from a worker)
if QUICK_EXIT:
    atexit.register(_exit_now)

import numpy.ma  # noqa: E402  (numpy loads these on first use: np.unique calls np.ma.is_masked)
import numpy.random  # noqa: E402, F401

import runner.datasets.partition  # noqa: E402  (the splits, drawn in each job)
import runner.evidence.distributions  # noqa: E402  (training.summaries' F quantile)
import runner.execution.executors  # noqa: E402
import runner.training.grouping  # noqa: E402
import runner.training.loop  # noqa: E402
import runner.training.stacked  # noqa: E402
import runner.training.stacked_modules  # noqa: E402  (the tool's CNN and users' networks)

runner.execution.executors.deterministic_kernels()
