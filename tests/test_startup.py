"""Start-up: what the CLI and the workers import, the deterministic switch, and when
`recipe run` starts the worker fork server early."""

import os
import subprocess

import pytest
from conftest import PYTHON, invoke, subprocess_env, write_recipe

from runner.execution.forkserver import default_workers


def _modules_after(code: str) -> set[str]:
    proc = subprocess.run(
        [PYTHON, "-c", f"{code}\nimport sys\nprint(' '.join(sys.modules))"],
        env=subprocess_env(),
        capture_output=True,
        text=True,
        check=True,
    )
    return set(proc.stdout.split())


def _cli_alone(args: list[str], heavy: tuple[str, ...] = ("torch",)) -> tuple[list[str], str]:
    """Run one CLI command in a fresh interpreter: (its exit code, the worker fork server's
    pid or None, whether each of ``heavy`` got imported), and its stderr."""
    code = (
        f"import sys\nfrom runner.cli.app import cli\nimport multiprocessing.forkserver as f\n"
        f"try:\n    cli({args!r})\nexcept SystemExit as e:\n"
        f"    print(e.code, f._forkserver._forkserver_pid, *(m in sys.modules for m in {heavy!r}))"
    )
    proc = subprocess.run([PYTHON, "-c", code], env=subprocess_env(), capture_output=True, text=True)
    return proc.stdout.split()[-2 - len(heavy) :], proc.stderr


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


LIGHT = """
    name = "light"
    seeds = [1]
    [data]
    source = "iris"
    [model]
    hidden = [8]
    [train]
    epochs = 2
"""
LIGHT_CNN = LIGHT.replace('source = "iris"', 'source = "digits"').replace(
    "hidden = [8]", 'kind = "cnn"\nchannels = [2]'
)  # stacked through torch.func


@pytest.mark.slow
def test_reading_results_needs_no_torch_nor_sklearn(tmp_path):
    # board, status and diff read the store: a practitioner's most frequent commands stay
    # quick (the bundled data set is described, not loaded: datasets/bundled.py)
    path = write_recipe(tmp_path, LIGHT)
    assert invoke("run", path, "--workers", 1, "-q").exit_code == 0
    board = tmp_path / "board.json"
    for args in (
        ["board", path],
        ["status", path],
        ["board", path, "--format", "json", "--out", board],
        ["diff", board, board],
        ["run", path],  # nothing left to train: no workers, no torch
    ):
        state, err = _cli_alone([str(a) for a in args], ("torch", "sklearn", "scipy.stats"))
        assert state == ["0", "None", "False", "False", "False"], (args, err[-300:])


@pytest.mark.slow
def test_a_small_plan_trains_in_process_and_a_pool_run_leaves_torch_to_its_workers(tmp_path):
    path = write_recipe(tmp_path, LIGHT)
    state, err = _cli_alone(["run", str(path), "--store", str(tmp_path / "a.sqlite")], ("torch", "sklearn", "scipy"))
    assert state == ["0", "None", "True", "False", "False"], err[-300:]  # one small group: trained here, no
    # server; the split and the bundled data need no scikit-learn (datasets/partition.py, bundled.py)
    assert "in this process" in err
    wide = write_recipe(tmp_path, LIGHT + '[factors]\n"model.hidden" = [[8], [9], [10]]\n', name="wide.toml")
    state, err = _cli_alone(["run", str(wide), "--store", str(tmp_path / "b.sqlite"), "--workers", "2"])
    assert state[0] == "0" and state[1] != "None", err[-300:]  # three items, two worker processes
    assert state[2] == "False", "the main process of a pool run imports no torch"
    assert "on 2 worker processes" in err


@pytest.mark.slow
def test_a_pool_run_of_the_tools_cnn_sizes_its_groups_without_torch(tmp_path):
    # stacked CNN groups are sized by counting (footprint.network_counts), not by building a
    # network here: a torch import in this process would delay the fork server by seconds
    path = write_recipe(tmp_path, LIGHT_CNN + '[factors]\n"model.hidden" = [[4], [5]]\n', name="cnn.toml")
    state, err = _cli_alone(["run", str(path), "--store", str(tmp_path / "c.sqlite"), "--workers", "2"])
    assert state[0] == "0" and state[1] != "None", err[-300:]
    assert state[2] == "False", "the main process of a pool run imports no torch"
    assert "2 stacked groups of 1 job on 2 worker processes" in err


@pytest.mark.slow
def test_a_command_that_loaded_torch_ends_with_its_output_whole(tmp_path):
    # the console script skips the interpreter's teardown once torch is loaded (runner/cli):
    # the output must still be whole, in-process and from a pool run, through pipes
    for name, text, extra in (("light", LIGHT, []), ("wide", LIGHT + '[factors]\n"model.hidden" = [[8], [9], [10]]\n',
                                                       ["--workers", "2"])):  # fmt: skip
        path = write_recipe(tmp_path, text, name=f"{name}.toml")
        store = str(tmp_path / f"{name}.sqlite")
        ran = subprocess.run([PYTHON, "-m", "runner", "run", str(path), "--store", store, *extra],
                             env=subprocess_env(), capture_output=True, text=True)  # fmt: skip
        assert ran.returncode == 0, ran.stderr[-300:]
        board = subprocess.run([PYTHON, "-m", "runner", "board", str(path), "--store", store],
                               env=subprocess_env(), capture_output=True, text=True, check=True)  # fmt: skip
        assert ran.stdout == board.stdout and ran.stdout.endswith("\n")


@pytest.mark.slow
def test_the_quick_exit_keeps_exit_handlers_and_the_meaning_of_exit_codes():
    # SystemExit's meaning (None is 0, an int is itself, a text is printed and means 1), with
    # every atexit handler run and buffered output flushed before the process ends
    for code, status, err in (("None", 0, ""), ("3", 3, ""), ("'no such file'", 1, "no such file\n")):
        script = (
            "import atexit, sys, torch\nfrom runner.cli import _exit_now\n"
            "atexit.register(lambda: sys.stdout.write('handler ran\\n'))\n"
            f"sys.stdout.write('buffered ')\n_exit_now({code})\nsys.stdout.write('not reached')\n"
        )
        proc = subprocess.run([PYTHON, "-c", script], env=_buffered(), capture_output=True, text=True)
        assert (proc.returncode, proc.stdout, proc.stderr) == (status, "buffered handler ran\n", err)


def _buffered() -> dict:
    """The subprocess environment with Python's own output buffering (some shells and CI
    set PYTHONUNBUFFERED, under which a missing flush could not be seen)."""
    env = subprocess_env()
    env.pop("PYTHONUNBUFFERED", None)
    return env


@pytest.mark.slow
def test_the_quick_exit_steps_aside_for_live_threads_and_reports_lost_output():
    # another non-daemon thread still working: a normal exit, which waits for it
    script = (
        "import sys, threading, time, torch\nfrom runner.cli import _exit_now\n"
        "threading.Thread(target=lambda: (time.sleep(0.3), print('thread done'))).start()\n"
        "_exit_now(0)\nprint('returned')\n"
    )
    proc = subprocess.run([PYTHON, "-c", script], env=subprocess_env(), capture_output=True, text=True)
    assert proc.returncode == 0 and sorted(proc.stdout.split("\n")) == ["", "returned", "thread done"]
    # buffered output that cannot be written (here its descriptor is gone) is an error, as
    # Python's own exit makes it (status 120)
    script = "import os, sys, torch\nfrom runner.cli import _exit_now\nsys.stdout.write('x')\nos.close(1)\n"
    proc = subprocess.run([PYTHON, "-c", script + "_exit_now(0)\n"], env=_buffered(), capture_output=True, text=True)
    assert proc.returncode == 120 and "could not be written" in proc.stderr
    normal = subprocess.run([PYTHON, "-c", script], env=_buffered(), capture_output=True, text=True)
    assert normal.returncode == 120  # the reference: Python's own exit, same script


PROBE = """
from runner.execution.forkserver import worker_context


def quick_exit():
    import runner.execution.preload as preload
    return preload.QUICK_EXIT


if __name__ == "__main__":
    with worker_context().Pool(1) as pool:
        print(pool.apply(quick_exit))
    import runner.execution.preload as preload
    print(preload.QUICK_EXIT)
"""


@pytest.mark.slow
def test_only_the_fork_server_ends_at_once(tmp_path):
    # the fork server's quick exit is registered in the server (a worker forked from it
    # sees it), and importing the preload module anywhere else changes nothing
    script = tmp_path / "probe.py"
    script.write_text(PROBE)
    proc = subprocess.run([PYTHON, str(script)], env=subprocess_env(), capture_output=True, text=True, timeout=120)
    assert proc.stdout.split() == ["True", "False"], proc.stderr[-500:]
    plain = subprocess.run([PYTHON, "-c", "import sys, runner.execution.preload\nsys.exit(3)"], env=subprocess_env())
    assert plain.returncode == 3


FIRST_ITEM = """
import sys
from runner.execution.forkserver import worker_context


def first_item(path):
    from runner.execution.estimate import work_items
    from runner.execution.executors import _work, prepare_process
    from runner.recipe.grid import expand
    from runner.recipe.loader import load_recipe

    grid = expand(load_recipe(path))
    items = work_items(grid, list(grid), stack=True)
    prepare_process(1, grid.datasets)  # not worker=True: a worker ignoring SIGTERM can hang Pool.terminate
    before = set(sys.modules)
    _work(items[0])
    return sorted(set(sys.modules) - before)


if __name__ == "__main__":
    with worker_context().Pool(1) as pool:
        print(" ".join(pool.apply(first_item, (sys.argv[1],))) or "nothing")
"""


@pytest.mark.slow
@pytest.mark.parametrize("network", ["mlp", "cnn"])
def test_a_workers_first_job_imports_nothing_its_fork_server_could_have(tmp_path, network):
    # a module a worker imports on its first job costs every worker (and every replacement
    # for one that died) that time on the job's clock; the fork server imports it once
    script = tmp_path / "first_item.py"
    script.write_text(FIRST_ITEM)
    path = write_recipe(tmp_path, LIGHT_CNN if network == "cnn" else LIGHT)
    proc = subprocess.run([PYTHON, str(script), str(path)], env=subprocess_env(), capture_output=True, text=True,
                          timeout=300)  # fmt: skip
    assert proc.stdout.split() == ["nothing"], proc.stdout[-500:] + proc.stderr[-500:]
