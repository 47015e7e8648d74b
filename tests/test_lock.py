"""store/lock: one writer per store. The lock is taken before anything is planned, printed or
deleted; on the same host it is held exactly while its process lives (a suspended runner keeps
it, a reused pid does not); a damaged lock row holds nothing.

Real runners in their own sessions, real signals (SIGSTOP, SIGCONT, SIGKILL), real SQLite."""

import json
import os
import signal
import socket
import sqlite3
import time

import pytest
from conftest import invoke, write_recipe
from harness import jobs, kill_session, lock_row, query, start_run, wait_for

from runner.store.lock import process_start

RECIPE = """
    name = "locks"
    seeds = {seeds}
    [data]
    source = "iris"
    [model]
    hidden = [8]
    [train]
    epochs = 3
    [factors]
    "train.optimizer" = ["sgd", "adam"]
"""


def recipes(tmp_path):
    """(a finished grid, a grid that shares its jobs and adds one seed)."""
    done = write_recipe(tmp_path, RECIPE.format(seeds="[1, 2]"), "done.toml")
    more = write_recipe(tmp_path, RECIPE.format(seeds="[1, 2, 3]"), "more.toml")
    return done, more


def holding_runner(more, store, tmp_path):
    """A runner that holds the store and hangs in its first new job (a real process)."""
    proc = start_run([more, "--store", store, "--workers", 1, "-q"], RECIPE_FAULT="hang@1")
    assert wait_for(lambda: query(store, "SELECT key FROM running"), 180), "the runner should start a job"
    return proc


@pytest.mark.slow
def test_fresh_and_a_second_runner_refuse_before_deleting_or_printing(tmp_path):
    done, more = recipes(tmp_path)
    store = tmp_path / "s.sqlite"
    assert invoke("run", done, "--store", store, "--workers", 1, "-q").exit_code == 0
    before = jobs(store)
    assert len(before) == 4
    first = holding_runner(more, store, tmp_path)
    try:
        fresh = invoke("run", done, "--store", store, "--fresh", "--yes", "--workers", 1)
        assert fresh.exit_code == 2 and f"pid {first.pid}" in fresh.stderr
        assert jobs(store) == before, "a refused --fresh must delete nothing"
        second = invoke("run", more, "--store", store, "--workers", 1)
        assert second.exit_code == 2 and "is using this store" in second.stderr
        assert "jobs," not in second.stderr and "training" not in second.stderr, "no plan before refusing"
        assert len(second.stderr.strip().splitlines()) == 1 and "Traceback" not in second.stderr
    finally:
        kill_session(first)
    assert jobs(store) == before


@pytest.mark.slow
def test_a_suspended_runner_keeps_its_lock_on_the_same_host(tmp_path):
    done, more = recipes(tmp_path)
    store = tmp_path / "s.sqlite"
    first = holding_runner(more, store, tmp_path)
    try:
        os.killpg(first.pid, signal.SIGSTOP)  # Ctrl-Z
        # the state after a long suspension: the last heartbeat an hour old
        with sqlite3.connect(store) as c:
            c.execute(
                "UPDATE meta SET value = json_set(value, '$.heartbeat', ?) WHERE key = 'runner'", (time.time() - 3600,)
            )
        second = invoke("run", more, "--store", store, "--workers", 1)
        assert second.exit_code == 2 and f"pid {first.pid}" in second.stderr
        assert query(store, "SELECT count(*) FROM jobs")[0][0] == 0, "the second runner trained nothing"
        os.killpg(first.pid, signal.SIGCONT)
        assert wait_for(lambda: json.loads(lock_row(store))["heartbeat"] > time.time() - 60, 60), "it beats again"
    finally:
        kill_session(first)
    # its process gone, the lock is taken over at once
    assert invoke("run", more, "--store", store, "--workers", 1, "-q").exit_code == 0
    assert len(jobs(store)) == 6 and lock_row(store) is None


def _plant_lock(store, **fields):
    with sqlite3.connect(store) as c:
        c.execute("INSERT OR REPLACE INTO meta VALUES ('runner', ?)", (json.dumps(fields),))


@pytest.mark.parametrize("same_start", [True, False])
def test_a_live_pid_holds_the_lock_only_with_its_start_time(tmp_path, same_start):
    """pid 1 is alive on every Linux host; a lock naming it with its own start time is held,
    with another start time it belongs to a process long gone whose pid was reused."""
    if process_start(1) is None:
        pytest.skip("needs /proc/1/stat")
    done, _ = recipes(tmp_path)
    store = tmp_path / "s.sqlite"
    assert invoke("run", done, "--store", store, "--workers", 1, "-q").exit_code == 0
    start = process_start(1) if same_start else "1"
    _plant_lock(store, pid=1, host=socket.gethostname(), start=start, heartbeat=time.time() - 3600)
    result = invoke("run", done, "--store", store, "--workers", 1, "--retry-failed", "-q")
    if same_start:
        assert result.exit_code == 2 and "pid 1 on" in result.stderr
    else:
        assert result.exit_code == 0 and lock_row(store) is None


@pytest.mark.parametrize("row", ["{not json", '"a string"', '{"pid": "x", "host": 3}'])
def test_a_damaged_lock_row_holds_nothing(tmp_path, row):
    done, _ = recipes(tmp_path)
    store = tmp_path / "s.sqlite"
    assert invoke("run", done, "--store", store, "--workers", 1, "-q").exit_code == 0
    with sqlite3.connect(store) as c:
        c.execute("INSERT OR REPLACE INTO meta VALUES ('runner', ?)", (row,))
    status = invoke("status", done, "--store", store)
    assert status.exit_code == 0 and "4 done, 0 running" in status.stdout
    again = invoke("run", done, "--store", store, "--workers", 1, "--fresh", "--yes", "-q")
    assert again.exit_code == 0, again.stderr
    assert len(jobs(store)) == 4 and lock_row(store) is None
