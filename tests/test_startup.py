"""Start-up: what the CLI and the workers import, the deterministic switch, and when
`recipe run` starts the worker fork server early."""

import os
import subprocess

import pytest
from conftest import PYTHON, invoke, subprocess_env, write_recipe

from runner.execution.forkserver import default_workers, wants_workers
from runner.recipe.loader import RunSettings


def _modules_after(code: str) -> set[str]:
    proc = subprocess.run(
        [PYTHON, "-c", f"{code}\nimport sys\nprint(' '.join(sys.modules))"],
        env=subprocess_env(),
        capture_output=True,
        text=True,
        check=True,
    )
    return set(proc.stdout.split())


def _cli_alone(args: list[str]) -> tuple[list[str], str]:
    """Run one CLI command in a fresh interpreter: (its exit code, the worker fork server's
    pid or None, whether torch got imported), and its stderr."""
    code = (
        f"import sys\nfrom runner.cli.app import cli\nimport multiprocessing.forkserver as f\n"
        f"try:\n    cli({args!r})\nexcept SystemExit as e:\n"
        f"    print(e.code, f._forkserver._forkserver_pid, 'torch' in sys.modules)"
    )
    proc = subprocess.run([PYTHON, "-c", code], env=subprocess_env(), capture_output=True, text=True)
    return proc.stdout.split()[-3:], proc.stderr


@pytest.mark.slow
def test_cli_and_package_import_without_torch():
    # `recipe --help`, completion and a malformed recipe's error must not wait for torch
    loaded = _modules_after("import runner.cli.app, runner.execution.forkserver")
    assert "torch" not in loaded and "scipy" not in loaded and "sklearn" not in loaded
    loaded = _modules_after("import runner\nrunner.Store")  # names still there, on first use
    assert "runner.store.database" in loaded


@pytest.mark.slow
def test_deterministic_switch_matches_the_public_one():
    # torch.use_deterministic_algorithms(True) sets two things a CPU run can see: the flag,
    # and filling fresh tensors (torch.empty) with NaN; the cheaper switch must set both
    code = (
        "import torch, math\nfrom runner.execution.executors import deterministic_kernels\n"
        "assert not torch.are_deterministic_algorithms_enabled()\n"
        "deterministic_kernels()\n"
        "print(torch.are_deterministic_algorithms_enabled(), "
        "torch.is_deterministic_algorithms_warn_only_enabled(), math.isnan(torch.empty(4)[0]))"
    )
    ours = subprocess.run([PYTHON, "-c", code], env=subprocess_env(), capture_output=True, text=True, check=True)
    public = subprocess.run(
        [PYTHON, "-c", code.replace("deterministic_kernels()", "torch.use_deterministic_algorithms(True)")],
        env=subprocess_env(),
        capture_output=True,
        text=True,
        check=True,
    )
    assert ours.stdout.split() == public.stdout.split() == ["True", "False", "True"]


@pytest.mark.parametrize(
    "run, workers, on, expected",
    [
        ({}, 2, None, True),
        ({}, 1, None, False),
        ({"workers": 1}, None, None, False),
        ({"workers": 3}, None, None, True),
        ({"workers": 3}, 1, None, False),  # the option wins over the recipe
        ({"on": "dask-local"}, 2, None, False),
        ({}, 2, "dask://127.0.0.1:8786", False),
        ({"on": "dask-local"}, 2, "local", True),
    ],
)
def test_when_the_fork_server_starts_early(run, workers, on, expected):
    assert wants_workers(workers, on, RunSettings(**run)) is expected


@pytest.mark.slow
def test_validating_a_recipe_needs_no_torch_and_a_bad_one_starts_no_workers(tmp_path):
    # a typo in a recipe is reported at once, by every command, and starts no worker server
    good, bad = tmp_path / "good.toml", tmp_path / "bad.toml"
    good.write_text(
        'name = "x"\nseeds = [1]\n[data]\nsource = "iris"\n[model]\nactivation = "tanh"\n'
        '[train]\noptimizer = "nesterov"\nl1 = 0.01\n'
    )
    bad.write_text('name = "x"\nseeds = [1]\n[data]\nsource = "iris"\n[train]\nepochz = 3\n')
    loaded = _modules_after(f"from runner.recipe.loader import load_recipe\nload_recipe({str(good)!r})")
    assert "torch" not in loaded
    for command in ("run", "check", "board", "status", "report"):
        state, err = _cli_alone([command, str(bad)] + (["--workers", "2"] if command == "run" else []))
        assert "unknown key" in err, (command, err)
        assert state == ["2", "None", "False"], command  # exit 2, no server, no torch


def test_default_worker_count_is_the_usable_cores():
    assert default_workers() == len(os.sched_getaffinity(0))


@pytest.mark.slow
def test_reading_results_needs_no_torch(tmp_path):
    # board, status and diff read the store: a practitioner's most frequent commands stay quick
    path = write_recipe(
        tmp_path,
        """
        name = "light"
        seeds = [1, 2]
        [data]
        source = "iris"
        [model]
        hidden = [8]
        [train]
        epochs = 2
    """,
    )
    assert invoke("run", path, "--workers", 1, "-q").exit_code == 0
    board = tmp_path / "board.json"
    for args in (
        ["board", path],
        ["status", path],
        ["board", path, "--format", "json", "--out", board],
        ["diff", board, board],
    ):
        state, err = _cli_alone([str(a) for a in args])
        assert state[0] == "0" and state[2] == "False", (args, err[-300:])
