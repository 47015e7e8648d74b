"""store/opening: a store path that is not a usable store of this tool is refused in one line
(exit 2), never adopted, never left behind empty; a store that is deleted, replaced, full or
read-only stops the run with a message saying so, and the results stored before stay intact.

Real SQLite files, a real full disk (a small tmpfs) and a real read-only folder (a read-only
bind mount); real runner processes where a file must change under a running one."""

import os
import shutil
import sqlite3

import pytest
from conftest import invoke, write_recipe
from harness import (
    fill,
    jobs,
    kill_session,
    query,
    read_only_view,
    small_disk,
    start_run,
    stored_count,
    wait_for,
)

RECIPE = """
    name = "stores"
    seeds = [1, 2]
    [data]
    source = "iris"
    [model]
    hidden = [8]
    [train]
    epochs = {epochs}
    [factors]
    "train.optimizer" = ["sgd", "adam"]
"""


def recipe(tmp_path, epochs=3, name="r.toml"):
    return write_recipe(tmp_path, RECIPE.format(epochs=epochs), name)


def one_line_error(result, *phrases):
    assert result.exit_code == 2, result.output
    assert result.stderr.startswith("error: ") and len(result.stderr.strip().splitlines()) == 1, result.stderr
    assert "Traceback" not in result.stderr
    for phrase in phrases:
        assert phrase in result.stderr, result.stderr


def tables(path):
    with sqlite3.connect(path) as c:
        return sorted(r[0] for r in c.execute("SELECT name FROM sqlite_master WHERE type = 'table'"))


def test_another_programs_database_is_refused_and_left_untouched(tmp_path):
    path = recipe(tmp_path)
    other = tmp_path / "crm.db"
    with sqlite3.connect(other) as c:
        c.execute("CREATE TABLE customers (id INTEGER, name TEXT)")
        c.execute("INSERT INTO customers VALUES (1, 'x')")
    before = other.read_bytes()
    for command in (["run", "--workers", 1], ["board"], ["status"], ["check", "--no-probe"]):
        result = invoke(command[0], path, "--store", other, *command[1:])
        one_line_error(result, "crm.db", "not a results store", "tables customers")
    assert other.read_bytes() == before and tables(other) == ["customers"]
    empty = tmp_path / "empty.db"
    empty.write_bytes(b"")  # an empty file is an empty database: it may become a store
    assert invoke("run", path, "--store", empty, "--workers", 1, "-q").exit_code == 0
    assert stored_count(empty) == 4


@pytest.mark.parametrize(
    ("damage", "run_heals"),
    [
        ("UPDATE meta SET value = 'x1' WHERE key = 'schema'", False),
        ("UPDATE jobs SET levels = '{cut' WHERE rowid = (SELECT min(rowid) FROM jobs)", False),
        # a job whose status is not a finished one is not finished: a run trains it again
        ("UPDATE jobs SET status = 'exploded' WHERE rowid = (SELECT min(rowid) FROM jobs)", True),
    ],
)
def test_a_damaged_row_is_a_one_line_error(tmp_path, damage, run_heals):
    path = recipe(tmp_path)
    store = tmp_path / "s.sqlite"
    assert invoke("run", path, "--store", store, "--workers", 1, "-q").exit_code == 0
    with sqlite3.connect(store) as c:
        c.execute(damage)
    one_line_error(invoke("board", path, "--store", store), "s.sqlite", "damaged")
    run = invoke("run", path, "--store", store, "--workers", 1)
    if run_heals:
        assert run.exit_code == 0 and "4 jobs, 3 done, 1 to run" in run.stderr
        assert invoke("board", path, "--store", store).exit_code == 0
        return
    assert run.exit_code == 2 and "Traceback" not in run.stderr
    assert run.stderr.strip().splitlines()[-1].startswith("error: ") and "damaged" in run.stderr


def test_store_paths_that_are_not_files_are_refused(tmp_path):
    path = recipe(tmp_path)
    one_line_error(invoke("run", path, "--store", path / "x.sqlite"), "is a file, not a folder")
    one_line_error(invoke("run", path, "--store", tmp_path), "is a directory")
    one_line_error(invoke("board", path, "--store", "/dev/null"), "is a device")
    fifo = tmp_path / "pipe"
    os.mkfifo(fifo)
    one_line_error(invoke("status", path, "--store", fifo), "named pipe")
    dangling = tmp_path / "link.sqlite"
    dangling.symlink_to(tmp_path / "nowhere" / "x.sqlite")
    one_line_error(invoke("run", path, "--store", dangling, "--workers", 1), "symbolic link", "does not exist")
    assert dangling.is_symlink(), "the user's link is left as it was"
    text = tmp_path / "notes.txt"
    text.write_text("not a database\n" * 100)
    one_line_error(invoke("run", path, "--store", text, "--workers", 1), "not an SQLite database")
    assert text.read_text() == "not a database\n" * 100


@pytest.mark.parametrize(
    "options",
    [
        ["--mlflow", "bogus://x"],
        ["--on", "dask://127.0.0.1:1"],
        ["--on", "dask-locl"],
    ],
)
def test_a_refused_run_leaves_no_store_behind(tmp_path, options):
    pytest.importorskip("mlflow") if options[0] == "--mlflow" else pytest.importorskip("distributed")
    path = recipe(tmp_path)
    result = invoke("run", path, "--workers", 1, *options)
    assert result.exit_code == 2 and "Traceback" not in result.stderr
    assert options[1] in result.stderr
    assert "jobs," not in result.stderr, "refused before the plan is shown"
    assert not (tmp_path / "runs").exists(), "no empty store (or folder made for it) is left"


@pytest.mark.slow
@pytest.mark.parametrize("how", ["deleted", "replaced"])
def test_a_store_deleted_or_replaced_during_a_run_stops_it(tmp_path, how):
    path = recipe(tmp_path, epochs=600)
    store = tmp_path / "s.sqlite"
    proc = start_run([path, "--store", store, "--workers", 1, "--no-stack"])
    try:
        assert wait_for(lambda: stored_count(store) >= 1, 300), "a first job should be stored"
        if how == "replaced":
            shutil.copy(store, tmp_path / "copy.sqlite")
            os.replace(tmp_path / "copy.sqlite", store)  # the path now names another file
        else:
            for suffix in ("", "-wal", "-shm"):
                (tmp_path / f"s.sqlite{suffix}").unlink(missing_ok=True)
        out, err = proc.communicate(timeout=600)
    finally:
        kill_session(proc)
    assert proc.returncode == 2, err
    assert "deleted or replaced while in use" in err and "Traceback" not in err
    assert "rank" not in out, "no leaderboard as if the results were kept"


@pytest.mark.slow
def test_disk_full_while_writing_a_result_keeps_the_stored_ones(tmp_path):
    """A tmpfs that really fills: a result of 400 epochs of curves needs about 200 KB, and
    after the first grid's results the disk is filled to 80 KB of free space, enough to open
    the store and take the lock but not to write the next result."""
    first = write_recipe(tmp_path, RECIPE.format(epochs=400).replace("[1, 2]", "[1]"), "first.toml")
    both = recipe(tmp_path, epochs=400)  # the same jobs and two more
    with small_disk(tmp_path / "disk", "2m") as disk:
        store = disk / "s.sqlite"
        assert invoke("run", first, "--store", store, "--workers", 1, "-q").exit_code == 0
        kept = jobs(store)
        assert len(kept) == 2
        filler = fill(disk, leave=80_000)
        full = invoke("run", both, "--store", store, "--workers", 1, "--no-stack")
        assert full.exit_code == 2, full.output
        assert "disk holding the store is full" in full.stderr and "writing a job's result" in full.stderr
        assert "Traceback" not in full.stderr and "rollback" not in full.stderr
        assert query(store, "PRAGMA integrity_check") == [("ok",)]
        assert jobs(store) == kept, "the results stored before are intact"
        filler.unlink()
        again = invoke("run", both, "--store", store, "--workers", 1, "-q")
        assert again.exit_code == 0, again.stderr
        final = jobs(store)
        assert len(final) == 4 and all(final[k] == v for k, v in kept.items()), "nothing stored is redone"


@pytest.mark.slow
def test_a_full_disk_at_open_is_one_line_and_leaves_nothing(tmp_path):
    path = recipe(tmp_path)
    with small_disk(tmp_path / "disk", "256k") as disk:
        fill(disk, leave=0)
        result = invoke("run", path, "--store", disk / "runs" / "s.sqlite", "--workers", 1)
        one_line_error(result, "full")
        assert sorted(p.name for p in disk.iterdir()) == ["filler"]


@pytest.mark.slow
def test_a_read_only_store_serves_reading_and_refuses_training(tmp_path):
    path = recipe(tmp_path)
    folder = tmp_path / "results"
    folder.mkdir()
    assert invoke("run", path, "--store", folder / "s.sqlite", "--workers", 1, "-q").exit_code == 0
    with read_only_view(folder, tmp_path / "ro") as ro:
        store = ro / "s.sqlite"
        board = invoke("board", path, "--store", store)
        assert board.exit_code == 0 and "sgd" in board.stdout
        assert "4 done" in invoke("status", path, "--store", store).stdout
        assert invoke("check", path, "--store", store, "--no-probe").exit_code == 0
        assert invoke("report", path, "--store", store, "--out", tmp_path / "r.html").exit_code == 0
        assert invoke("run", path, "--store", store, "--workers", 1, "-q").exit_code == 0, "nothing to train"
        more = recipe(tmp_path, epochs=4, name="more.toml")
        one_line_error(invoke("run", more, "--store", store, "--workers", 1), "read-only", "4 jobs to run")
        one_line_error(invoke("run", path, "--store", store, "--fresh", "--yes"), "read-only")
        one_line_error(invoke("board", path, "--store", store, "--out", ro / "board.txt"), "--out", "read-only")
        one_line_error(invoke("run", path, "--store", ro / "new.sqlite", "--workers", 1), "read-only")
