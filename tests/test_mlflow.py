"""mlflow_export: runs read back from a real sqlite-backed MLflow store equal the store's."""

import json
import sqlite3

import pytest

pytest.importorskip("mlflow")
pytest.importorskip("sqlalchemy")
from conftest import invoke, write_recipe
from mlflow.tracking import MlflowClient

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
        for name, value in metrics[key].items():
            assert run.data.metrics[name] == pytest.approx(value, rel=1e-12)
        for name, values in curves[key].items():
            history = client.get_metric_history(run.info.run_id, name)
            assert [m.step for m in history] == list(range(1, len(values) + 1))
            assert [m.value for m in history] == pytest.approx(values, rel=1e-12)
    again = invoke("export-mlflow", path, "--store", store, "--uri", uri)
    assert again.exit_code == 0 and "0 jobs logged" in again.stdout and "4 were already there" in again.stdout


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
