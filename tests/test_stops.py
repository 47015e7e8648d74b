"""cli/stops and execution/executors: a run stopped by a signal other than Ctrl-C ends the
same way (every finished job stored, a resume line, 128 + the signal's number, no traceback),
and workers left behind by a runner killed outright end quietly and soon.

Real runner processes in their own sessions and real signals."""

import os
import signal

import pytest
from conftest import invoke, write_recipe
from harness import jobs, kill_session, lock_row, query, session_pids, start_run, stored_count, wait_for

RECIPE = """
    name = "stops"
    seeds = [1, 2]
    [data]
    source = "iris"
    [model]
    hidden = [16]
    [train]
    epochs = {epochs}
    batch_size = 8
    [factors]
    "train.optimizer" = ["sgd", "adam"]
"""


@pytest.mark.slow
@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGHUP])
def test_sigterm_and_sighup_stop_a_run_like_ctrl_c(tmp_path, sig):
    path = write_recipe(tmp_path, RECIPE.format(epochs=300))
    store = tmp_path / "s.sqlite"
    proc = start_run([path, "--store", store, "--workers", 2, "--no-stack"])
    try:
        assert wait_for(lambda: stored_count(store) >= 1, 300), "a first job should be stored"
        os.killpg(proc.pid, sig)  # the whole group, as a terminal or a job scheduler sends it
        _, err = proc.communicate(timeout=120)
    finally:
        kill_session(proc)
    assert proc.returncode == 128 + sig, err
    assert "Run the same command again to resume" in err and "Traceback" not in err
    assert query(store, "PRAGMA integrity_check") == [("ok",)]
    assert lock_row(store) is None, "the lock is released"
    before = jobs(store)
    assert invoke("run", path, "--store", store, "--workers", 2, "-q").exit_code == 0
    after = jobs(store)
    assert len(after) == 4 and all(after[k] == v for k, v in before.items())


@pytest.mark.slow
@pytest.mark.parametrize("on", ["local", "dask-local"])
def test_workers_of_a_killed_runner_exit_quietly(tmp_path, on):
    if on == "dask-local":
        pytest.importorskip("distributed")
    path = write_recipe(tmp_path, RECIPE.format(epochs=100000))
    store = tmp_path / "s.sqlite"
    log = tmp_path / "stderr.txt"
    with open(log, "w") as err:
        proc = start_run([path, "--store", store, "--workers", 2, "--no-stack", "--on", on], stderr=err)
        try:
            # the runner, the fork server (or Dask's scheduler) and two busy workers
            assert wait_for(lambda: len(query(store, "SELECT key FROM running") or []) >= 2, 300)
            assert len(session_pids(proc.pid)) >= 3
            os.kill(proc.pid, signal.SIGKILL)  # the runner only: its workers are left behind
            proc.wait(timeout=30)
            gone = wait_for(lambda: not session_pids(proc.pid), 120)
        finally:
            kill_session(proc)
    text = log.read_text()
    assert gone, "the workers should end once their runner is gone"
    for word in ("Traceback", "BrokenPipe", "ConnectionReset", "EOFError", "Warning"):
        assert word not in text, text
