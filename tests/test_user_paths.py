"""files: a path the user names is read only if it is a regular file of sensible size, and a
file the user asks for is written or refused in one line; never a hang, a traceback, or a
truncated file that looks complete."""

import os

import pytest
from conftest import invoke, write_recipe

RECIPE = """
    name = "paths"
    seeds = [1]
    [data]
    source = "iris"
    [model]
    hidden = [4]
    [train]
    epochs = 2
"""


def one_line_error(result, *phrases):
    assert result.exit_code == 2, result.output
    assert result.stderr.startswith("error: ") and len(result.stderr.strip().splitlines()) == 1, result.stderr
    assert "Traceback" not in result.stderr
    for phrase in phrases:
        assert phrase in result.stderr, result.stderr


def strange_paths(tmp_path):
    """Paths that are not a readable regular file, with the words that must name each."""
    fifo = tmp_path / "pipe.toml"
    os.mkfifo(fifo)  # opening it for reading would block until a writer came
    huge = tmp_path / "huge.toml"
    with open(huge, "wb") as f:
        f.truncate(64 << 20)  # sparse: 64 MB of zeros, no disk used
    (tmp_path / "loop_a.toml").symlink_to(tmp_path / "loop_b.toml")
    (tmp_path / "loop_b.toml").symlink_to(tmp_path / "loop_a.toml")
    return {
        "/dev/zero": "is a device",
        str(fifo): "named pipe",
        str(tmp_path): "is a directory",
        str(huge): "larger than the limit",
        str(tmp_path / "loop_a.toml"): "symbolic links",
        str(tmp_path / "missing.toml"): "not found",
    }


@pytest.mark.parametrize("command", ["check", "run", "board", "status", "report"])
def test_a_recipe_path_that_is_not_a_recipe_file(tmp_path, command):
    for path, words in strange_paths(tmp_path).items():
        one_line_error(invoke(command, path, "--store", tmp_path / "s.sqlite"), words)
    assert not (tmp_path / "s.sqlite").exists()


def test_diff_and_new_read_only_regular_files(tmp_path):
    paths = strange_paths(tmp_path)
    store = tmp_path / "s.sqlite"
    path = write_recipe(tmp_path, RECIPE)
    assert invoke("run", path, "--store", store, "-q", "--workers", 1).exit_code == 0
    one_line_error(invoke("diff", "/dev/zero", store), "is a device")
    fifo = next(p for p in paths if p.endswith("pipe.toml"))
    one_line_error(invoke("diff", store, fifo), "named pipe")
    one_line_error(invoke("new", "/dev/zero", "--out", tmp_path / "z.toml"), "is a device")
    one_line_error(invoke("new", fifo, "--out", tmp_path / "z.toml"), "named pipe")
    deep = tmp_path / "deep.json"
    deep.write_text("[" * 100_000)
    one_line_error(invoke("diff", deep, store), "not a leaderboard JSON file")


@pytest.mark.parametrize("command", ["board", "report"])
def test_out_into_a_place_that_cannot_be_written(tmp_path, command):
    path = write_recipe(tmp_path, RECIPE)
    store = tmp_path / "s.sqlite"
    assert invoke("run", path, "--store", store, "-q", "--workers", 1).exit_code == 0
    cases = {
        tmp_path / "no_such_folder" / "out.txt": "Create the folder first",
        path / "out.txt": "Not a directory",
        tmp_path: "Give a file name, not a folder",
        "/dev/full": "No space left on device",
    }
    for target, words in cases.items():
        one_line_error(invoke(command, path, "--store", store, "--out", target), "--out", words)
    assert not (tmp_path / "no_such_folder").exists()
    good = tmp_path / "out.txt"
    assert invoke(command, path, "--store", store, "--out", good).exit_code == 0 and good.stat().st_size > 0
