"""schedule/store: Ctrl-C, dying workers, time limits, a second runner, stale locks, --fresh.

Faults are real: worker processes exit, segfault or hang (runner/faults.py makes them do so
at a chosen epoch); the runner gets real signals."""

import json
import os
import signal
import socket
import sqlite3
import subprocess
import textwrap
import time

import pytest
from conftest import PYTHON, invoke, stored_metrics, subprocess_env, write_recipe

pytestmark = pytest.mark.slow  # starts processes, sends signals, or starts Dask, MLflow or a browser

RECIPE = """
    name = "faults"
    seeds = [1, 2]
    [data]
    source = "iris"
    [model]
    hidden = [16]
    [train]
    epochs = {epochs}
    [factors]
    "train.batch_size" = [8, 16]
"""


def recipe(tmp_path, epochs=6):
    return write_recipe(tmp_path, RECIPE.format(epochs=epochs))


def start(args, **env):
    e = subprocess_env()
    e.update(env)
    return subprocess.Popen(
        [PYTHON, "-m", "runner", "run", *map(str, args)],
        env=e,
        start_new_session=True,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )


def rows(store):
    with sqlite3.connect(store) as c:
        return {k: (s, e, a) for k, s, e, a in c.execute("SELECT key, status, error, attempts FROM jobs")}


def wait_for(predicate, seconds=60):
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        if predicate():
            return True
        time.sleep(0.05)
    return False


def count(store):
    try:
        with sqlite3.connect(store, timeout=1) as c:
            return c.execute("SELECT count(*) FROM jobs").fetchone()[0]
    except sqlite3.OperationalError:
        return 0


def test_ctrl_c_exits_130_with_a_resume_hint(tmp_path):
    path = recipe(tmp_path, epochs=150)
    store = tmp_path / "s.sqlite"
    proc = start([path, "--store", store, "--workers", 2])
    assert wait_for(lambda: count(store) >= 1, 120)
    os.killpg(proc.pid, signal.SIGINT)  # what a terminal's Ctrl-C sends: the whole group
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 130
    assert "Run the same command again to resume" in err and "Traceback" not in err
    with sqlite3.connect(store) as c:
        assert c.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    before = rows(store)
    assert invoke("run", path, "--store", store, "--workers", 2, "-q").exit_code == 0
    after = rows(store)
    assert len(after) == 4 and all(after[k] == before[k] for k in before)


def test_ctrl_c_during_start_up_prints_no_traceback(tmp_path):
    path = recipe(tmp_path, epochs=150)
    # from the moment the command's own code runs (before that, Python itself is starting and
    # any program prints a traceback on Ctrl-C): about when the server is spawned, while it
    # imports, and while the runner imports torch
    begin = time.monotonic()
    subprocess.run([PYTHON, "-c", "import runner.cli.app"], env=subprocess_env(), check=True)
    ready = time.monotonic() - begin
    for delay in (ready + 0.05, ready + 0.3, ready + 1.0):
        proc = start([path, "--store", tmp_path / f"s{delay}.sqlite", "--workers", 2])
        time.sleep(delay)
        os.killpg(proc.pid, signal.SIGINT)
        _, err = proc.communicate(timeout=60)
        # 130, or ended by the SIGINT itself after the message (a shell shows 130 for both):
        # a Ctrl-C held back while the server is spawned can arrive as Python exits
        assert proc.returncode in (130, -signal.SIGINT), (delay, err)
        assert "Traceback" not in err and "Fatal" not in err, (delay, err)
        assert "Run the same command again" in err


def test_ctrl_c_while_the_command_line_imports_exits_130(tmp_path):
    # a real SIGINT, sent by the process to itself at the moment the command line's import of
    # click begins (an import hook only picks the moment): the console script's guard turns
    # it into one line and exit 130
    script = textwrap.dedent("""
        import os, signal, sys
        class Interrupt:
            def find_spec(self, name, path=None, target=None):
                if name == "click":
                    os.kill(os.getpid(), signal.SIGINT)
                return None
        sys.meta_path.insert(0, Interrupt())
        sys.argv = ["recipe", "--help"]
        from runner.cli import main
        main()
    """)
    proc = subprocess.run([PYTHON, "-c", script], env=subprocess_env(), capture_output=True, text=True, timeout=60)
    assert proc.returncode == 130, proc.stderr
    assert "Traceback" not in proc.stderr and "Interrupted before anything ran" in proc.stderr


def test_worker_death_is_retried_and_result_is_unchanged(tmp_path):
    path = recipe(tmp_path)
    store, clean = tmp_path / "s.sqlite", tmp_path / "clean.sqlite"
    proc = start(
        [path, "--store", store, "--workers", 2, "-q"], RECIPE_FAULT="exit@2", RECIPE_FAULT_ONCE=str(tmp_path / "fired")
    )
    proc.communicate(timeout=120)
    assert proc.returncode == 0
    got = rows(store)
    assert [v[0] for v in got.values()] == ["done"] * 4
    # The dying worker held one stacked group (one batch size's two seeds): both were tried again.
    assert sorted(v[2] for v in got.values()) == [1, 1, 2, 2]
    assert invoke("run", path, "--store", clean, "--workers", 1, "-q").exit_code == 0
    assert stored_metrics(store) == stored_metrics(clean)


def test_worker_that_always_dies_is_recorded_failed(tmp_path):
    path = recipe(tmp_path)
    store = tmp_path / "s.sqlite"
    proc = start([path, "--store", store, "--workers", 2, "--max-attempts", 2, "-q"], RECIPE_FAULT="segv@1")
    proc.communicate(timeout=120)
    assert proc.returncode == 0
    got = rows(store)
    assert len(got) == 4
    for status, error, attempts in got.values():
        assert status == "failed" and "SIGSEGV" in error and attempts == 2
    assert "failed 2/2" in invoke("board", path, "--store", store).stdout


def test_job_time_limit_in_the_recipe(tmp_path):
    path = recipe(tmp_path, epochs=100000)
    path.write_text(path.read_text().replace("[train]", "[train]\ntime_limit = 0.5"))
    store = tmp_path / "s.sqlite"
    assert invoke("run", path, "--store", store, "--workers", 1, "-q").exit_code == 0
    assert {v[0] for v in rows(store).values()} == {"timeout"}
    assert "4 timed out" in invoke("status", path, "--store", store).stdout


def test_stuck_worker_is_killed_past_the_hard_limit(tmp_path):
    path = recipe(tmp_path)
    store = tmp_path / "s.sqlite"
    proc = start(
        [path, "--store", store, "--workers", 2, "--time-limit", 1, "-q"],
        RECIPE_FAULT="hang@1",
        RECIPE_FAULT_ONCE=str(tmp_path / "fired"),
    )
    proc.communicate(timeout=120)
    assert proc.returncode == 0
    statuses = sorted(v[0] for v in rows(store).values())
    assert statuses == ["done", "done", "done", "timeout"]


def test_second_runner_refuses_then_stale_lock_is_recovered(tmp_path):
    path = recipe(tmp_path, epochs=400)
    store = tmp_path / "s.sqlite"
    first = start([path, "--store", store, "--workers", 1, "-q"])

    def locked():
        try:
            with sqlite3.connect(store, timeout=1) as c:
                return c.execute("SELECT 1 FROM meta WHERE key = 'runner'").fetchone() is not None
        except sqlite3.OperationalError:
            return False

    assert wait_for(locked, 60)
    second = invoke("run", path, "--store", store, "--workers", 1)
    assert second.exit_code == 2
    assert f"pid {first.pid}" in second.stderr and "is using this store" in second.stderr
    # the first runner holds one stacked group: one batch size's two seeds are running
    assert wait_for(lambda: "2 running" in invoke("status", path, "--store", store).stdout, 30)
    os.killpg(first.pid, signal.SIGKILL)  # leaves its lock and its running mark behind
    first.wait()
    assert locked()
    assert "0 running" in invoke("status", path, "--store", store).stdout
    assert invoke("run", path, "--store", store, "--workers", 1, "-q").exit_code == 0
    assert [v[0] for v in rows(store).values()] == ["done"] * 4
    assert not locked()


def test_lock_with_old_heartbeat_from_another_host_is_stale(tmp_path):
    path = recipe(tmp_path, epochs=2)
    store = tmp_path / "s.sqlite"
    assert invoke("run", path, "--store", store, "--workers", 1, "-q").exit_code == 0
    with sqlite3.connect(store) as c:
        c.execute(
            "INSERT INTO meta VALUES ('runner', ?)",
            (json.dumps({"pid": 1, "host": "elsewhere-" + socket.gethostname(), "heartbeat": time.time() - 3600}),),
        )
    assert invoke("run", path, "--store", store, "--workers", 1, "--retry-failed", "-q").exit_code == 0


def test_fresh_needs_confirmation(tmp_path):
    path = recipe(tmp_path, epochs=2)
    store = tmp_path / "s.sqlite"
    invoke("run", path, "--store", store, "--workers", 1, "-q")
    refused = invoke("run", path, "--store", store, "--fresh")
    assert refused.exit_code == 2 and "--yes" in refused.stderr
    assert len(rows(store)) == 4
    again = invoke("run", path, "--store", store, "--fresh", "--yes", "--workers", 1)
    assert again.exit_code == 0 and "4 jobs, 0 done, 4 to run" in again.stderr
