"""Chaos: the runner is SIGKILLed at randomized moments (fixed seed) until the grid is done.
Every job is finished exactly once, the numbers equal an uninterrupted run, and the store
passes SQLite's integrity check after every kill."""

import os
import signal
import sqlite3
import subprocess
import time

import numpy as np
import pytest
from conftest import PYTHON, invoke, stored_metrics, subprocess_env, write_recipe

pytestmark = pytest.mark.slow  # starts processes, sends signals, or starts Dask, MLflow or a browser

RECIPE = """
    name = "chaos"
    seeds = [1, 2, 3]
    [data]
    source = "wine"
    [model]
    hidden = [32]
    [train]
    epochs = 40
    batch_size = 8
    checkpoint_every = 10
    [factors]
    "train.optimizer" = ["sgd", "adam", "momentum"]
"""


def snapshot(store):
    with sqlite3.connect(store) as c:
        assert c.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        jobs = {k: (f, a) for k, f, a in c.execute("SELECT key, finished, attempts FROM jobs")}
    return jobs, stored_metrics(store)


def test_random_kills_then_complete(tmp_path):
    path = write_recipe(tmp_path, RECIPE)
    store = tmp_path / "s.sqlite"
    rng = np.random.default_rng(2026)
    seen: dict = {}
    kills = 0
    for delay in rng.uniform(1.5, 5.0, size=8):
        proc = subprocess.Popen(
            [PYTHON, "-m", "runner", "run", str(path), "--store", str(store), "--workers", "2", "-q"],
            env=subprocess_env(),
            start_new_session=True,
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
        )
        time.sleep(delay)
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
            kills += 1
        proc.wait()
        if store.exists():
            jobs, _ = snapshot(store)
            for key, record in seen.items():
                assert jobs[key] == record, "a finished job was written again"
            seen.update(jobs)
        if len(seen) == 9:
            break
    assert kills >= 2, "the test should interrupt the grid several times"
    assert invoke("run", path, "--store", store, "--workers", 2, "-q").exit_code == 0
    jobs, values = snapshot(store)
    assert len(jobs) == 9 and all(a == 1 for _, a in jobs.values())
    for key, record in seen.items():
        assert jobs[key] == record
    clean = tmp_path / "clean.sqlite"
    assert invoke("run", path, "--store", clean, "--workers", 1, "-q").exit_code == 0
    assert values == snapshot(clean)[1]
