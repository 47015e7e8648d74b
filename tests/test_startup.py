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


@pytest.mark.parametrize("run_table, workers, on, expected", [
    ("", 2, None, True),
    ("", 1, None, False),
    ("[run]\nworkers = 1\n", None, None, False),
    ("[run]\nworkers = 3\n", None, None, True),
    ("[run]\nworkers = 3\n", 1, None, False),        # the option wins over the recipe
    ("[run]\non = \"dask-local\"\n", 2, None, False),
    ("", 2, "dask://127.0.0.1:8786", False),
    ("[run]\nworkers = \"many\"\n", None, None, False),  # odd values: no early start, the
    ("[run\n", 2, None, False),                          # full validation reports them later
])
def test_when_the_fork_server_starts_early(tmp_path, run_table, workers, on, expected):
    path = tmp_path / "r.toml"
    path.write_text('name = "x"\n' + run_table)
    assert wants_workers(str(path), workers, on) is expected
    assert wants_workers(str(tmp_path / "missing.toml"), workers, on) is False


def test_default_worker_count_is_the_usable_cores():
    import os

    assert default_workers() == len(os.sched_getaffinity(0))
