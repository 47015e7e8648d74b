"""Executors: run job specs and hand each result back, in the main process, as it arrives.

The interface is ``run(items, datasets, on_result, on_start=None)``, where an item is a tuple
of job specs trained together (one spec, or a stacked group; see stack.py):
- ``SerialExecutor`` runs in this process (for debugging and one-worker runs);
- ``PoolExecutor`` runs worker processes that import torch once and take many jobs;
- ``DaskExecutor`` (dask_executor.py) sends jobs to a dask.distributed cluster.
The caller's ``on_result`` writes the store, so only the main process ever writes results.
The main process of a pool run needs no torch: only the workers (and the serial executor)
import it.
"""

from __future__ import annotations

import contextlib
import os
import signal
import threading
import time
import warnings
from collections import deque
from collections.abc import Callable
from multiprocessing.connection import wait

from runner.datasets.sources import Dataset
from runner.execution.forkserver import default_workers, start_early, worker_context
from runner.training.job import JobResult, JobSpec, Status

__all__ = ["PoolExecutor", "SerialExecutor", "default_workers", "deterministic_kernels", "prepare_process"]

OnResult = Callable[[JobSpec, JobResult, int], None]  # spec, result, attempts used
OnStart = Callable[[JobSpec], None]
OnProgress = Callable[[tuple, float], None]  # a work item, the share of its epochs done
PROGRESS_EVERY = 0.5  # seconds between a worker's progress messages at most

_DATASETS: dict[str, Dataset] = {}


def grace(limit: float) -> float:
    """Seconds past a hard time limit before a stuck worker is killed: 2 to 10 s."""
    return max(2.0, min(10.0, 0.5 * limit))


def deterministic_kernels() -> None:
    """torch.use_deterministic_algorithms(True) without its import of torch's compiler
    configuration (about a second, in every process that starts; the tool compiles
    nothing, so that setting is never read). Where torch lacks the internal switch, the
    public function."""
    import torch

    switch = getattr(torch._C, "_set_deterministic_algorithms", None)
    if switch is None:
        torch.use_deterministic_algorithms(True)
    else:
        switch(True, warn_only=False)


def prepare_process(threads: int, datasets: dict[str, Dataset] | None = None, worker: bool = False) -> None:
    """Fixed threads and deterministic kernels: the conditions for bitwise-equal reruns."""
    global _DATASETS
    import threadpoolctl
    import torch

    torch.set_num_threads(threads)
    threadpoolctl.threadpool_limits(threads, user_api="blas")  # numpy's BLAS (the stacked path's products)
    deterministic_kernels()
    if datasets is not None:
        _DATASETS = datasets
    warnings.filterwarnings("ignore", module="sklearn")
    if worker:  # the main process decides what Ctrl-C (or a stop signal to the whole group) does
        for sig in (signal.SIGINT, signal.SIGTERM, getattr(signal, "SIGHUP", None)):
            if sig is not None:
                signal.signal(sig, signal.SIG_IGN)


_SINGLE_PATH_READY = False


def ready_for(item: tuple[JobSpec, ...]) -> None:
    """Import what this work item's path needs before its clock starts. The single-job path's
    torch.optim imports torch's compiler front end when it builds its first optimizer (over
    a second, enough to trip a short time limit); stacked groups never need it, so workers
    and the fork server do not import it unless a single job comes. A bundled data set is
    loaded here too, on its first use in this process (datasets/bundled.py)."""
    global _SINGLE_PATH_READY
    from runner.training.grouping import Stacked

    ds = _DATASETS.get(item[0].data_id)
    if ds is not None:
        ds.X  # noqa: B018  (loads it, if it is loaded lazily)

    if not _SINGLE_PATH_READY and not isinstance(item, Stacked):
        import torch

        torch.optim.SGD([torch.zeros(1, requires_grad=True)], lr=0.1)
        _SINGLE_PATH_READY = True


def _work(item: tuple[JobSpec, ...], on_epoch=None) -> list[JobResult]:
    from runner.training.loop import train_item

    ready_for(item)
    return train_item(item, _DATASETS, on_epoch)


def _throttled(send: Callable[[float], None]) -> Callable[[float], None]:
    """``send`` at most every PROGRESS_EVERY seconds (a short group's epochs come faster
    than the progress line needs them)."""
    last = [time.monotonic()]

    def report(share: float) -> None:
        now = time.monotonic()
        if now - last[0] >= PROGRESS_EVERY:
            last[0] = now
            send(share)

    return report


class SerialExecutor:
    def __init__(self, threads: int = 1):
        self.threads = threads

    def where(self, items) -> str:
        return "in this process"

    def run(
        self,
        items,
        datasets,
        on_result: OnResult,
        on_start: OnStart | None = None,
        on_progress: OnProgress | None = None,
    ) -> None:
        import threadpoolctl
        import torch

        previous = torch.get_num_threads()
        blas = threadpoolctl.threadpool_limits(None)  # remembers the current limits
        prepare_process(self.threads, datasets)
        try:
            for item in items:
                for spec in item:
                    if on_start:
                        on_start(spec)
                share = None if on_progress is None else _throttled(lambda f, item=item: on_progress(item, f))
                for spec, result in zip(item, _work(item, share)):
                    on_result(spec, result, 1)
        finally:
            torch.set_num_threads(previous)
            blas.restore_original_limits()


def _exit_with_parent() -> None:
    """End this worker quietly when the process that made it is gone (the runner was killed:
    its fork server exits, and the worker is handed to another parent). Training on would
    only end in a pipe with nobody at the other end."""
    parent = os.getppid()

    def watch() -> None:
        while os.getppid() == parent:
            time.sleep(1.0)
        os._exit(0)

    threading.Thread(target=watch, daemon=True, name="parent-watch").start()


def _worker_main(conn, threads: int, datasets: dict) -> None:
    prepare_process(threads, datasets, worker=True)
    _exit_with_parent()
    while True:
        item = _talk(conn.recv)
        if item is None:
            return
        ready_for(item)
        _talk(conn.send, ("start", None))  # the job's clock starts here, not while the worker boots
        _talk(conn.send, ("result", _work(item, _throttled(lambda share: _talk(conn.send, ("epoch", share))))))


def _talk(op, *args):
    """A message to or from the runner; if the runner is gone (EOF, BrokenPipe,
    ConnectionReset) there is nobody to report to, so the worker ends quietly."""
    try:
        return op(*args)
    except (EOFError, OSError):
        os._exit(0)


class _Worker:
    def __init__(self, ctx, threads, datasets):
        self.conn, child = ctx.Pipe()
        self.proc = ctx.Process(target=_worker_main, args=(child, threads, datasets), daemon=True)
        self.proc.start()
        child.close()
        self.spec: tuple[JobSpec, ...] | None = None  # the work item it holds
        self.started: float | None = None
        self.share = 0.0  # of the item's epochs done

    def read(self) -> tuple[list[JobResult] | None, bool]:
        """(the finished item's results or None, whether the pipe broke)."""
        try:
            while self.conn.poll():
                kind, payload = self.conn.recv()
                if kind == "start":
                    self.started = time.monotonic()
                elif kind == "epoch":
                    self.share = payload
                else:
                    return payload, False
        except (EOFError, OSError):
            return None, True
        return None, False

    def stop(self) -> None:
        if self.proc.is_alive():
            self.proc.kill()
        self.proc.join(timeout=5)
        self.conn.close()


def _death(exitcode: int | None) -> str:
    if exitcode is not None and exitcode < 0:
        name = signal.Signals(-exitcode).name
        extra = "; out of memory?" if name == "SIGKILL" else ""
        return f"worker process died ({name}{extra})"
    return f"worker process died (exit code {exitcode})"


class PoolExecutor:
    """Worker processes, each holding one work item at a time.

    A worker that dies (killed, out of memory, a crash in native code) is replaced; the work it
    held (one job or a stacked group) is tried again up to ``max_attempts`` in all, then each of
    its jobs is recorded as failed with the reason.
    Other workers' jobs are not disturbed. With ``hard_limit`` seconds, a job still running
    a grace period past it (stuck where the job's own time check cannot run) has its worker
    killed and is recorded as timed out (``grace``: a job's own check normally stops it first).
    """

    def __init__(self, workers: int, threads: int = 1, max_attempts: int = 2, hard_limit: float | None = None):
        self.workers = workers
        self.threads = threads
        self.max_attempts = max_attempts
        self.hard_limit = hard_limit

    def where(self, items) -> str:
        n = min(self.workers, len(items))
        return f"on {n} worker process{'es' if n > 1 else ''}"

    def run(
        self,
        items,
        datasets,
        on_result: OnResult,
        on_start: OnStart | None = None,
        on_progress: OnProgress | None = None,
    ) -> None:
        ctx = worker_context()
        start_early()  # if `recipe run` has not already: with Ctrl-C ignored (see forkserver.py)
        queue = deque(items)
        attempts: dict[str, int] = {}
        pool = [_Worker(ctx, self.threads, datasets) for _ in range(min(self.workers, len(queue)))]
        try:
            while queue or any(w.spec for w in pool):
                for w in pool:
                    if w.spec is None and queue:
                        w.spec, w.started, w.share = queue.popleft(), None, 0.0
                        if on_start:
                            for spec in w.spec:
                                on_start(spec)
                        w.conn.send(w.spec)
                ready = set(wait([w.conn for w in pool] + [w.proc.sentinel for w in pool], timeout=1.0))
                for i, w in enumerate(list(pool)):
                    share = w.share
                    result, broken = w.read() if w.conn in ready else (None, False)
                    if on_progress is not None and w.share != share and w.spec is not None and result is None:
                        on_progress(w.spec, w.share)
                    if result is not None:
                        item, w.spec = w.spec, None
                        for spec, res in zip(item, result):
                            on_result(spec, res, attempts.get(item[0].key, 0) + 1)
                        continue
                    overdue = (
                        w.spec is not None
                        and self.hard_limit
                        and w.started is not None
                        and time.monotonic() - w.started > self.hard_limit + grace(self.hard_limit)
                    )
                    if w.proc.sentinel in ready or broken or overdue:
                        item = w.spec
                        if not overdue:
                            w.proc.join(timeout=5)  # reap it, to read how it died
                        w.stop()
                        code = w.proc.exitcode
                        pool[i] = _Worker(ctx, self.threads, datasets)
                        if item is None:
                            continue
                        tries = attempts[item[0].key] = attempts.get(item[0].key, 0) + 1
                        if overdue:
                            error = (
                                f"worker killed {grace(self.hard_limit):g} s past the {self.hard_limit:g} s time limit"
                            )
                            for spec in item:
                                on_result(spec, JobResult(key=spec.key, status=Status.TIMEOUT, error=error), tries)
                        elif tries < self.max_attempts:
                            queue.appendleft(item)
                        else:
                            for spec in item:
                                on_result(
                                    spec,
                                    JobResult(
                                        key=spec.key,
                                        status=Status.FAILED,
                                        error=f"{_death(code)} on each of {tries} attempts",
                                    ),
                                    tries,
                                )
        finally:
            for w in pool:
                if w.proc.is_alive() and w.spec is None:
                    with contextlib.suppress(OSError):
                        w.conn.send(None)
                w.stop()
