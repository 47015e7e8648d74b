"""Executors: run job specs and hand each result back, in the main process, as it arrives.

The interface is one method, ``run(specs, on_result)``. ``SerialExecutor`` runs in-process
(for debugging); ``PoolExecutor`` runs worker processes that import torch once each and take
many jobs. The caller's ``on_result`` writes the store, so only the main process writes.
"""
from __future__ import annotations

import multiprocessing
import os
import signal
import warnings
from collections import deque
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from typing import Callable

import torch

from .data import Dataset
from .train import JobResult, JobSpec, run_job

__all__ = ["SerialExecutor", "PoolExecutor", "prepare_process", "default_workers"]

OnResult = Callable[[JobSpec, JobResult, int], None]  # spec, result, attempts used

_DATASETS: dict[str, Dataset] = {}


def default_workers() -> int:
    return max(1, len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count() or 1)


def prepare_process(threads: int, datasets: dict[str, Dataset], worker: bool = False) -> None:
    """Fixed threads and deterministic kernels: the conditions for bitwise-equal reruns."""
    global _DATASETS
    torch.set_num_threads(threads)
    torch.use_deterministic_algorithms(True)
    _DATASETS = datasets
    warnings.filterwarnings("ignore", category=UserWarning, module="sklearn")
    if worker:
        signal.signal(signal.SIGINT, signal.SIG_IGN)  # the main process decides what Ctrl-C does


def _work(spec: JobSpec) -> JobResult:
    return run_job(spec, _DATASETS[spec.data_id])


class SerialExecutor:
    def __init__(self, threads: int = 1):
        self.threads = threads

    def run(self, specs: list[JobSpec], datasets: dict[str, Dataset], on_result: OnResult) -> None:
        previous = torch.get_num_threads()
        prepare_process(self.threads, datasets)
        try:
            for spec in specs:
                on_result(spec, _work(spec), 1)
        finally:
            torch.set_num_threads(previous)


class PoolExecutor:
    """A pool of spawned worker processes.

    When a worker dies (killed, out of memory, a crash in native code) the pool is rebuilt and
    the jobs it was holding are tried again, up to ``max_attempts`` in all; then the job is
    recorded as failed with the reason.
    """

    def __init__(self, workers: int, threads: int = 1, max_attempts: int = 2):
        self.workers = workers
        self.threads = threads
        self.max_attempts = max_attempts

    def run(self, specs: list[JobSpec], datasets: dict[str, Dataset], on_result: OnResult) -> None:
        queue = deque(specs)
        attempts: dict[str, int] = {}
        ctx = multiprocessing.get_context("spawn")
        while queue:
            pool = ProcessPoolExecutor(max_workers=min(self.workers, len(queue)), mp_context=ctx,
                                       initializer=prepare_process,
                                       initargs=(self.threads, datasets, True))
            try:
                self._drain(pool, queue, attempts, on_result)
            except BaseException:
                _stop(pool)
                raise
            pool.shutdown(wait=True)

    def _drain(self, pool, queue, attempts, on_result) -> None:
        # Keep at most two jobs per worker in flight, so a broken pool strands few of them.
        inflight = {}
        while queue or inflight:
            while queue and len(inflight) < 2 * self.workers:
                spec = queue.popleft()
                inflight[pool.submit(_work, spec)] = spec
            done, _ = wait(inflight, return_when=FIRST_COMPLETED)
            for fut in done:
                spec = inflight.pop(fut)
                tries = attempts.get(spec.key, 0) + 1
                try:
                    result = fut.result()
                except BrokenProcessPool:
                    attempts[spec.key] = tries
                    if tries < self.max_attempts:
                        queue.append(spec)
                    else:
                        on_result(spec, JobResult(key=spec.key, status="failed",
                                                  error=f"worker process died ({tries} attempts)"), tries)
                    continue
                on_result(spec, result, tries)
            if any(isinstance(f.exception(), BrokenProcessPool) for f in done if f.done()):
                for fut, spec in inflight.items():  # the rest of this pool is lost: requeue
                    queue.appendleft(spec)
                return


def _stop(pool: ProcessPoolExecutor) -> None:
    """Abandon in-flight work at once: terminate the workers, drop queued jobs."""
    for proc in list(getattr(pool, "_processes", {}).values()):
        proc.terminate()
    pool.shutdown(wait=False, cancel_futures=True)
