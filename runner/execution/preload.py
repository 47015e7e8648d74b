"""Imported once by the worker fork server, before any worker forks from it.

Everything a worker needs is imported here once, so every worker, and every replacement for a
worker that died, starts in milliseconds with it already done: torch, the worker loop, the
stacked path (scikit-learn is not needed: the splits are drawn by datasets/partition.py, and
bundled data sets are read from scikit-learn's files by datasets/bundled.py). What
torch.optim imports on first use is left to the workers that run single jobs
(executors.ready_for): stacked groups never need it.
"""

import signal

# Ctrl-C reaches the whole process group; the main process decides what it means. The server
# starts with it blocked (forkserver.start_early); from here on it is ignored as well.
signal.signal(signal.SIGINT, signal.SIG_IGN)

import runner.execution.executors  # noqa: E402
import runner.training.loop  # noqa: E402
import runner.training.stacked  # noqa: E402

runner.execution.executors.deterministic_kernels()
