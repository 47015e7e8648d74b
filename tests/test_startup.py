"""Start-up: what the CLI and the workers import, the deterministic switch, and when
`recipe run` starts the worker fork server early."""
import subprocess

import pytest

from conftest import PYTHON, subprocess_env
from runner.forkserver import default_workers, wants_workers


def _modules_after(code: str) -> set[str]:
    proc = subprocess.run([PYTHON, "-c", f"{code}\nimport sys\nprint(' '.join(sys.modules))"],
                          env=subprocess_env(), capture_output=True, text=True, check=True)
    return set(proc.stdout.split())


def test_cli_and_package_import_without_torch():
    # `recipe --help`, completion and a malformed recipe's error must not wait for torch
    loaded = _modules_after("import runner.cli, runner.forkserver")
    assert "torch" not in loaded and "scipy" not in loaded and "sklearn" not in loaded
    loaded = _modules_after("import runner\nrunner.Store")  # names still there, on first use
    assert "runner.store" in loaded


def test_deterministic_switch_matches_the_public_one():
    # torch.use_deterministic_algorithms(True) sets two things a CPU run can see: the flag,
    # and filling fresh tensors (torch.empty) with NaN; the cheaper switch must set both
    code = ("import torch, math\nfrom runner.schedule import deterministic_kernels\n"
            "assert not torch.are_deterministic_algorithms_enabled()\n"
            "deterministic_kernels()\n"
            "print(torch.are_deterministic_algorithms_enabled(), "
            "torch.is_deterministic_algorithms_warn_only_enabled(), math.isnan(torch.empty(4)[0]))")
    ours = subprocess.run([PYTHON, "-c", code], env=subprocess_env(), capture_output=True, text=True, check=True)
    public = subprocess.run([PYTHON, "-c", code.replace("deterministic_kernels()", "torch.use_deterministic_algorithms(True)")],
                            env=subprocess_env(), capture_output=True, text=True, check=True)
    assert ours.stdout.split() == public.stdout.split() == ["True", "False", "True"]


@pytest.mark.parametrize("run, workers, on, expected", [
    ({}, 2, None, True),
    ({}, 1, None, False),
    ({"workers": 1}, None, None, False),
    ({"workers": 3}, None, None, True),
    ({"workers": 3}, 1, None, False),        # the option wins over the recipe
    ({"on": "dask-local"}, 2, None, False),
    ({}, 2, "dask://127.0.0.1:8786", False),
    ({"on": "dask-local"}, 2, "local", True),
])
def test_when_the_fork_server_starts_early(run, workers, on, expected):
    assert wants_workers(workers, on, run) is expected


def test_validating_a_recipe_needs_no_torch_and_a_bad_one_starts_no_workers(tmp_path):
    # a typo in a recipe is reported at once, by every command, and starts no worker server
    good, bad = tmp_path / "good.toml", tmp_path / "bad.toml"
    good.write_text('name = "x"\nseeds = [1]\n[data]\nsource = "iris"\n[model]\nactivation = "tanh"\n'
                    '[train]\noptimizer = "nesterov"\nl1 = 0.01\n')
    bad.write_text('name = "x"\nseeds = [1]\n[data]\nsource = "iris"\n[train]\nepochz = 3\n')
    loaded = _modules_after(f"from runner.recipe import load_recipe\nload_recipe({str(good)!r})")
    assert "torch" not in loaded
    for command in ("run", "check", "board", "status", "report"):
        args = [command, str(bad)] + (["--workers", "2"] if command == "run" else [])
        code = (f"import sys\nfrom runner.cli import cli\nimport multiprocessing.forkserver as f\n"
                f"try:\n    cli({args!r})\nexcept SystemExit as e:\n"
                f"    print('exit', e.code, 'server', f._forkserver._forkserver_pid, 'torch' in sys.modules)")
        proc = subprocess.run([PYTHON, "-c", code], env=subprocess_env(), capture_output=True, text=True)
        assert "unknown key" in proc.stderr, (command, proc.stderr)
        assert proc.stdout.split() == ["exit", "2", "server", "None", "False"], command


def test_default_worker_count_is_the_usable_cores():
    import os

    assert default_workers() == len(os.sched_getaffinity(0))
