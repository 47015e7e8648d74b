"""Run jobs on a dask.distributed cluster.

Workers only compute: each task carries the job spec and its dataset (small by design; sent
with the task rather than scattered, so a dying worker cannot take the only copy with it),
sets one torch thread and deterministic kernels, trains, and returns the
result. The main process alone writes the store, so no shared filesystem is needed. A task
whose worker dies is rescheduled by dask; after ``max_attempts`` deaths dask gives up on it
(KilledWorker) and the job is recorded as failed.
"""

from __future__ import annotations

from runner.errors import UserError
from runner.training.job import JobResult, Status

__all__ = ["DaskExecutor"]


def _task(item, dataset, threads):
    from runner.execution.executors import prepare_process, ready_for
    from runner.training.loop import train_item

    prepare_process(threads)
    ready_for(item)
    return train_item(item, {item[0].data_id: dataset})


class DaskExecutor:
    def __init__(self, on: str, workers: int, threads: int = 1, max_attempts: int = 2):
        try:
            import distributed  # noqa: F401
        except ImportError:
            raise UserError(
                "running on Dask needs the dask.distributed package",
                key="--on",
                value=on,
                hint='Install it with: python -m pip install -c constraints.txt -e ".[dask]"',
            ) from None
        self.on = on
        self.workers = workers
        self.threads = threads
        self.max_attempts = max_attempts
        if on.startswith("dask://"):
            self._reachable()

    def _reachable(self) -> None:
        """Refuse an unreachable scheduler now, before the plan is printed or a store made."""
        import socket

        host, _, port = self.on[len("dask://") :].rpartition(":")
        try:
            socket.create_connection((host.strip("[]"), int(port)), timeout=5).close()
        except OSError as exc:
            raise UserError(
                f"cannot reach the Dask scheduler ({exc.strerror or exc})",
                key="--on",
                value=self.on,
                hint="Start one with 'dask scheduler' and workers with 'dask worker ADDRESS'",
            ) from None

    def _client(self):
        import dask
        from distributed import Client, LocalCluster

        dask.config.set({"distributed.scheduler.allowed-failures": max(0, self.max_attempts - 1)})
        if self.on == "dask-local":
            # No dashboard and no status pages: Dask's scheduler always starts a web server
            # (port 8787 unless told otherwise), so it gets no pages and a free loopback port.
            dask.config.set({"distributed.scheduler.http.routes": [], "distributed.worker.http.routes": []})
            cluster = LocalCluster(
                n_workers=self.workers,
                threads_per_worker=1,
                processes=True,
                host="127.0.0.1",
                dashboard_address=None,
                scheduler_kwargs={"dashboard": False, "dashboard_address": "127.0.0.1:0"},
                silence_logs=40,
            )
            return Client(cluster), cluster
        address = "tcp://" + self.on[len("dask://") :]
        try:
            return Client(address, timeout=5), None
        except (OSError, TimeoutError) as exc:
            raise UserError(
                f"cannot reach the Dask scheduler ({exc})",
                key="--on",
                value=self.on,
                hint="Start one with 'dask scheduler' and workers with 'dask worker ADDRESS'",
            ) from None

    def run(self, items, datasets, on_result, on_start=None, on_progress=None) -> None:
        """``on_progress`` is not called: a task reports only its end."""
        from distributed import as_completed
        from distributed.client import FutureCancelledError

        client, cluster = self._client()
        try:
            futures = {}
            for item in items:
                fut = client.submit(
                    _task,
                    item,
                    datasets[item[0].data_id],
                    self.threads,
                    key=f"job-{item[0].key}-{len(item)}",
                    pure=False,
                )
                futures[fut] = item
                if on_start:
                    for spec in item:
                        on_start(spec)
            for fut in as_completed(futures):
                item = futures[fut]
                try:
                    results = fut.result()
                except FutureCancelledError:
                    continue
                except Exception as exc:  # KilledWorker and friends: the cluster gave up on it
                    results = [
                        JobResult(
                            key=s.key, status=Status.FAILED, error=f"{type(exc).__name__} on the Dask cluster: {exc}"
                        )
                        for s in item
                    ]
                for spec, result in zip(item, results):
                    on_result(spec, result, 1)
        finally:
            client.close()
            if cluster is not None:
                cluster.close()
