"""jobs/store: a runner killed with SIGKILL part-way resumes; no job runs twice; the numbers
equal an uninterrupted run bit for bit."""

import os
import signal
import sqlite3
import subprocess
import time

import pytest
from conftest import PYTHON, invoke, subprocess_env, write_recipe

pytestmark = pytest.mark.slow  # starts processes, sends signals, or starts Dask, MLflow or a browser

RECIPE = """
    name = "resume"
    seeds = [1, 2, 3, 4]
    [data]
    source = "iris"
    [model]
    hidden = [32, 32]
    dropout = 0.1
    [train]
    epochs = 150
    [factors]
    "train.batch_size" = [8, 16]  # two stacked groups of four

"""


def _rows(store):
    with sqlite3.connect(store) as c:
        jobs = {k: (s, f) for k, s, f in c.execute("SELECT key, status, finished FROM jobs")}
        metrics = sorted(c.execute("SELECT job_key, split, name, value FROM metrics"))
        curves = sorted(c.execute("SELECT job_key, name, epoch, value FROM curves"))
        ok = c.execute("PRAGMA integrity_check").fetchone()[0]
    return jobs, metrics, curves, ok


def _count_done(store):
    try:
        with sqlite3.connect(store, timeout=1) as c:
            return c.execute("SELECT count(*) FROM jobs").fetchone()[0]
    except sqlite3.OperationalError:
        return 0


def test_sigkill_then_resume_equals_uninterrupted(tmp_path):
    recipe = write_recipe(tmp_path, RECIPE)
    killed = tmp_path / "killed.sqlite"
    proc = subprocess.Popen(
        [PYTHON, "-m", "runner", "run", str(recipe), "--store", str(killed), "--workers", "2", "-q"],
        env=subprocess_env(),
        start_new_session=True,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    deadline = time.monotonic() + 120
    while _count_done(killed) < 2 and time.monotonic() < deadline and proc.poll() is None:
        time.sleep(0.05)
    os.killpg(proc.pid, signal.SIGKILL)  # the runner and its workers, with no chance to clean up
    proc.wait()
    before, _, _, ok = _rows(killed)
    assert ok == "ok"
    assert 2 <= len(before) < 8, "the kill should land part-way through the grid"

    result = invoke("run", recipe, "--store", killed, "--workers", 2, "-q")
    assert result.exit_code == 0
    after, metrics, curves, ok = _rows(killed)
    assert ok == "ok" and len(after) == 8
    assert all(after[k] == before[k] for k in before), "a finished job was run again"
    assert all(status == "done" for status, _ in after.values())

    clean = tmp_path / "clean.sqlite"
    assert invoke("run", recipe, "--store", clean, "--workers", 1, "-q").exit_code == 0
    _, metrics_clean, curves_clean, _ = _rows(clean)
    assert metrics == metrics_clean  # bit for bit: float equality on every stored number
    assert curves == curves_clean

    third = invoke("run", recipe, "--store", killed, "--workers", 2)
    assert "8 jobs, 8 done, 0 to run" in third.stderr
    assert _rows(killed)[0] == after
