"""mlflow_export: runs read back from a real sqlite-backed MLflow store equal the store's."""

import json
import os
import re
import signal
import sqlite3
import subprocess
import time

import pytest

pytest.importorskip("mlflow")
pytest.importorskip("sqlalchemy")
from conftest import PYTHON, invoke, subprocess_env, write_recipe
from mlflow.tracking import MlflowClient

from runner.outputs.mlflow_export import metric_name, recorded_complete

pytestmark = pytest.mark.slow  # starts processes, sends signals, or starts Dask, MLflow or a browser

RECIPE = """
    name = "track"
    seeds = [1, 2]
    [data]
    source = "iris"
    [model]
    hidden = [8]
    [train]
    epochs = 4
    [factors]
    "train.optimizer" = ["sgd", "adam"]
"""


def store_rows(store):
    with sqlite3.connect(store) as c:
        jobs = {
            k: (json.loads(s), seed, st) for k, s, seed, st in c.execute("SELECT key, settings, seed, status FROM jobs")
        }
        metrics = {}
        for k, split, name, v in c.execute("SELECT job_key, split, name, value FROM metrics"):
            metrics.setdefault(k, {})[f"{split}.{name}"] = v
        curves = {}
        for k, name, epoch, v in c.execute("SELECT job_key, name, epoch, value FROM curves ORDER BY epoch"):
            curves.setdefault(k, {}).setdefault(name, []).append(v)
    return jobs, metrics, curves


def test_round_trip_through_a_sqlite_mlflow_store(tmp_path):
    path = write_recipe(tmp_path, RECIPE)
    store = tmp_path / "s.sqlite"
    uri = f"sqlite:///{tmp_path / 'mlflow.db'}"
    result = invoke("run", path, "--store", store, "--workers", 1, "--mlflow", uri)
    assert result.exit_code == 0, result.stderr
    client = MlflowClient(tracking_uri=uri)
    exp = client.get_experiment_by_name("recipe/track")
    runs = client.search_runs([exp.experiment_id])
    parents = [r for r in runs if r.data.tags.get("recipe.kind") == "grid"]
    children = [r for r in runs if "recipe.job_key" in r.data.tags]
    assert len(parents) == 1 and len(children) == 4
    assert parents[0].info.status == "FINISHED" and {r.info.status for r in children} == {"FINISHED"}
    jobs, metrics, curves = store_rows(store)
    for run in children:
        tags = run.data.tags
        key = tags["recipe.job_key"]
        settings, seed, status = jobs[key]
        assert tags["mlflow.parentRunId"] == parents[0].info.run_id
        assert tags["recipe.seed"] == str(seed) and tags["recipe.status"] == status
        assert run.data.params["train.optimizer"] == settings["train"]["optimizer"]
        assert float(run.data.params["train.lr"]) == settings["train"]["lr"]
        assert run.data.params["seed"] == str(seed)
        # one naming: <split>.<name> for curves and finals alike (and the learning rate)
        assert all(re.fullmatch(r"(train|val|test)\.[a-z0-9_]+|lr", name) for name in run.data.metrics)
        for name, value in metrics[key].items():
            assert run.data.metrics[name] == pytest.approx(value, rel=1e-12)  # the latest value is the final
        for name, values in curves[key].items():
            history = client.get_metric_history(run.info.run_id, metric_name(name))
            assert [m.step for m in history] == list(range(1, len(values) + 1))
            assert [m.value for m in history] == pytest.approx(values, rel=1e-12)
    again = invoke("export-mlflow", path, "--store", store, "--uri", uri)
    assert again.exit_code == 0 and "0 jobs logged" in again.stdout and "4 were already there" in again.stdout
    # nothing to send is known from the store's own record, without importing MLflow; a
    # tracking file that is gone is never taken as holding the runs
    from runner.recipe.grid import expand
    from runner.recipe.loader import load_recipe
    from runner.store.database import Store

    grid = expand(load_recipe(path))
    with Store(store) as db:
        assert recorded_complete(uri, grid, db) == 4
        (tmp_path / "mlflow.db").rename(tmp_path / "moved.db")
        assert recorded_complete(uri, grid, db) is None


def test_unusable_tracking_store_loses_nothing_and_can_be_retried(tmp_path):
    path = write_recipe(tmp_path, RECIPE)
    store = tmp_path / "s.sqlite"
    assert invoke("run", path, "--store", store, "--workers", 1, "-q").exit_code == 0
    bad = tmp_path / "broken.db"
    bad.write_bytes(b"this is not a database" * 100)
    before = store_rows(store)
    failed = invoke("export-mlflow", path, "--store", store, "--uri", f"sqlite:///{bad}")
    assert failed.exit_code == 2 and "cannot use this MLflow tracking URI" in failed.stderr
    assert store_rows(store) == before
    good = f"sqlite:///{tmp_path / 'good.db'}"
    retried = invoke("export-mlflow", path, "--store", store, "--uri", good)
    assert retried.exit_code == 0 and "4 jobs logged" in retried.stdout


def test_curve_names_take_the_final_metrics_spelling():
    assert metric_name("val_f1_macro") == "val.f1_macro"
    assert metric_name("train_loss") == "train.loss" and metric_name("lr") == "lr"


@pytest.mark.slow
def test_interrupted_run_leaves_its_parent_killed_and_a_resumed_one_finished(tmp_path):
    """Ctrl-C (SIGINT to the process group) part-way: the parent run reads back KILLED, the
    jobs logged so far FINISHED; running again completes the grid and the parent FINISHED."""
    slow = RECIPE.replace("epochs = 4", "epochs = 400").replace("seeds = [1, 2]", "seeds = [1, 2, 3, 4]")
    path = write_recipe(tmp_path, slow)
    store = tmp_path / "s.sqlite"
    uri = f"sqlite:///{tmp_path / 'mlflow.db'}"
    args = [PYTHON, "-m", "runner", "run", str(path), "--store", str(store), "--workers", "1", "--no-stack"]
    proc = subprocess.Popen(
        [*args, "--mlflow", uri],
        env=subprocess_env(),
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        start_new_session=True,
    )
    deadline = time.monotonic() + 300
    while time.monotonic() < deadline:
        try:
            with sqlite3.connect(store, timeout=1) as c:
                if c.execute("SELECT count(*) FROM jobs").fetchone()[0] >= 1:
                    break
        except sqlite3.OperationalError:
            pass
        time.sleep(0.2)
    os.killpg(proc.pid, signal.SIGINT)
    assert proc.wait(timeout=120) == 130
    client = MlflowClient(tracking_uri=uri)
    exp = client.get_experiment_by_name("recipe/track")
    runs = client.search_runs([exp.experiment_id])
    parent = next(r for r in runs if r.data.tags.get("recipe.kind") == "grid")
    assert parent.info.status == "KILLED"
    assert all(r.info.status == "FINISHED" for r in runs if r.data.tags.get("recipe.kind") == "job")
    resumed = subprocess.run([*args, "--mlflow", uri, "-q"], env=subprocess_env(), capture_output=True, timeout=900)
    assert resumed.returncode == 0, resumed.stderr
    runs = client.search_runs([exp.experiment_id])
    assert client.get_run(parent.info.run_id).info.status == "FINISHED"
    assert sum(r.data.tags.get("recipe.kind") == "job" for r in runs) == 8


def test_an_unreachable_tracking_server_is_tried_once(tmp_path):
    """A server that accepts and hangs up at once (as a dead proxy does): the tracking check
    makes one connection and refuses the URI, instead of MLflow's minutes of retries; the run
    trains nothing and leaves no store."""
    import socket
    import threading

    server = socket.socket()
    server.bind(("127.0.0.1", 0))
    server.listen(16)
    accepted = []

    def serve():
        while True:
            try:
                conn, _ = server.accept()
            except OSError:
                return
            accepted.append(1)
            conn.close()

    threading.Thread(target=serve, daemon=True).start()
    try:
        path = write_recipe(tmp_path, RECIPE)
        uri = f"http://127.0.0.1:{server.getsockname()[1]}"
        result = invoke("run", path, "--workers", 1, "--mlflow", uri)
    finally:
        server.close()
    assert result.exit_code == 2 and "cannot use this MLflow tracking URI" in result.stderr
    assert "Traceback" not in result.stderr and "jobs," not in result.stderr
    assert len(accepted) == 1
    assert not (tmp_path / "runs").exists()
