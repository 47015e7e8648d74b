"""dask: a real LocalCluster with two worker processes on 127.0.0.1; one worker is killed
mid-grid; the grid completes with metrics bitwise equal to a local run."""

import os
import signal

import pytest

distributed = pytest.importorskip("distributed")

from conftest import invoke, stored_metrics, write_recipe  # noqa: E402

from runner.execution.planning import execute, make_executor  # noqa: E402
from runner.recipe.grid import expand  # noqa: E402
from runner.recipe.loader import load_recipe  # noqa: E402
from runner.store.database import Store  # noqa: E402

pytestmark = pytest.mark.slow  # starts processes, sends signals, or starts Dask, MLflow or a browser

RECIPE = """
    name = "dask"
    seeds = [1, 2, 3]
    [data]
    source = "wine"
    [model]
    hidden = [32]
    dropout = 0.2
    [train]
    epochs = 30
    batch_size = 8
    [factors]
    "train.optimizer" = ["sgd", "adam"]
"""


def test_dask_cluster_with_a_killed_worker_matches_local(tmp_path):
    path = write_recipe(tmp_path, RECIPE)
    cluster = distributed.LocalCluster(
        n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1", dashboard_address=None, silence_logs=40
    )
    client = distributed.Client(cluster)
    try:
        pids = list(client.run(os.getpid).values())
        assert len(pids) == 2
        grid = expand(load_recipe(path))
        killed = []

        def kill_one(job, result):
            if not killed:
                os.kill(pids[0], signal.SIGKILL)  # a worker dies with jobs still to run
                killed.append(pids[0])

        store_path = tmp_path / "dask.sqlite"
        with Store(store_path) as db:
            executor = make_executor(f"dask://{cluster.scheduler_address.split('://')[1]}", workers=2, max_attempts=3)
            execute(grid, db, list(grid), executor, on_stored=kill_one)
            statuses = [r.status for r in db.jobs()]
        assert killed and len(statuses) == 6 and set(statuses) == {"done"}
    finally:
        client.close()
        cluster.close()
    local = tmp_path / "local.sqlite"
    assert invoke("run", path, "--store", local, "--workers", 1, "-q").exit_code == 0
    assert stored_metrics(store_path) == stored_metrics(local)


def test_dask_local_option_runs_the_grid(tmp_path):
    path = write_recipe(tmp_path, RECIPE.replace("epochs = 30", "epochs = 3"))
    store = tmp_path / "s.sqlite"
    result = invoke("run", path, "--store", store, "--on", "dask-local", "--workers", 2, "-q")
    assert result.exit_code == 0, result.stderr
    local = tmp_path / "local.sqlite"
    invoke("run", path, "--store", local, "--workers", 1, "-q")
    assert stored_metrics(store) == stored_metrics(local)


def test_unreachable_scheduler_is_a_clear_error(tmp_path):
    path = write_recipe(tmp_path, RECIPE)
    result = invoke("run", path, "--store", tmp_path / "s.sqlite", "--on", "dask://127.0.0.1:9")
    assert result.exit_code == 2 and "cannot reach the Dask scheduler" in result.stderr


def test_run_table_in_the_recipe_selects_dask_local(tmp_path):
    path = write_recipe(
        tmp_path, RECIPE.replace("epochs = 30", "epochs = 2") + '\n[run]\non = "dask-local"\nworkers = 2\n'
    )
    result = invoke("run", path, "--store", tmp_path / "s.sqlite", "-q")
    assert result.exit_code == 0, result.stderr
    bad = write_recipe(tmp_path, RECIPE + '\n[run]\non = "cluster"\n', "bad.toml")
    refused = invoke("run", bad, "--store", tmp_path / "b.sqlite")
    assert refused.exit_code == 2 and "run.on" in refused.stderr and "dask://HOST:PORT" in refused.stderr


@pytest.mark.slow
def test_dask_local_opens_no_dashboard(tmp_path):
    """While a `--on dask-local` run trains, none of its processes listens on Dask's dashboard
    port 8787, and no port they listen on serves a dashboard or status page."""
    import http.client
    import urllib.error
    import urllib.request

    from harness import kill_session, listening_ports, query, session_pids, start_run, wait_for

    path = write_recipe(tmp_path, RECIPE.replace("epochs = 30", "epochs = 100000"))
    store = tmp_path / "s.sqlite"
    proc = start_run([path, "--store", store, "--on", "dask-local", "--workers", 1, "-q"])
    try:
        assert wait_for(lambda: query(store, "SELECT key FROM running"), 300), "the run should start"
        ports = listening_ports(session_pids(proc.pid))
        assert ports, "the scheduler listens somewhere"
        assert 8787 not in ports
        for port in ports:
            for page in ("/status", "/info/main/workers.html", "/json/identity.json"):
                try:
                    code = urllib.request.urlopen(f"http://127.0.0.1:{port}{page}", timeout=5).status
                except urllib.error.HTTPError as exc:
                    code = exc.code
                except (OSError, ValueError, http.client.HTTPException):
                    code = None  # not an HTTP server (Dask's own protocol)
                assert code != 200, (port, page)
    finally:
        kill_session(proc)
