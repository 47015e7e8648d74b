"""Imported once by the worker fork server, before any worker forks from it.

Everything a worker needs is imported here once, so every worker, and every replacement for a
worker that died, starts in milliseconds with it already done: torch, the worker loop, the
stacked path, scikit-learn's splitters (imported inside the first job of each worker they
took about 0.8 s of that job's time, enough to trip a one-second time limit). What
torch.optim imports on first use is left to the workers that run single jobs
(schedule.ready_for): stacked groups never need it.
"""

import signal

# Ctrl-C reaches the whole process group; the main process decides what it means. The server
# starts with it blocked (forkserver.start_early); from here on it is ignored as well.
signal.signal(signal.SIGINT, signal.SIG_IGN)

import sklearn.model_selection  # noqa: E402,F401  (runner.datasets.sources imports it lazily, for the CLI's start-up)

import runner.execution.executors  # noqa: E402
import runner.training.loop  # noqa: E402
import runner.training.stacked  # noqa: E402

runner.execution.executors.deterministic_kernels()
