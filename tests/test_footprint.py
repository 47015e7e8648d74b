"""recipe/footprint: the memory estimate behind "one job would need about N GB" counts the
model's parameters exactly as torch builds them, and bounds a real job's memory from above."""

import subprocess
import textwrap

import pytest
import torch
from conftest import PYTHON, invoke, subprocess_env, write_recipe

from runner.recipe.footprint import PARAM_COPIES, job_bytes, model_size, network_counts
from runner.recipe.grid import expand
from runner.recipe.loader import load_recipe
from runner.training.models import build_model

MODELS = [
    ("iris", "[model]\nhidden = [16, 8]"),
    ("iris", "[model]\nhidden = []"),
    ("digits", '[model]\nkind = "cnn"\nchannels = [4, 6]\nkernel_size = 3\nhidden = [12]'),
    ("digits", '[model]\nkind = "cnn"\nchannels = [3]\nkernel_size = 5\npool = "none"\nhidden = []'),
    ("digits", '[model]\nkind = "cnn"\nchannels = [2, 2, 2, 2]\nkernel_size = 4\npool = "avg"\nhidden = [5]'),
]


@pytest.mark.parametrize(("source", "model"), MODELS)
def test_parameter_count_equals_torchs(tmp_path, source, model):
    """Reference: torch's own count of the parameters of the network training builds."""
    path = write_recipe(tmp_path, f'name = "m"\n[data]\nsource = "{source}"\n{model}\n')
    grid = expand(load_recipe(path))
    settings = grid.configs[0].settings
    ds = next(iter(grid.datasets.values()))
    shape = tuple(ds.X.shape[1:])
    n_out = len(ds.classes)
    gen = torch.Generator().manual_seed(0)
    net = build_model(settings.model, shape, n_out, gen, gen)
    params, _ = model_size(settings, shape, n_out)
    assert params == sum(p.numel() for p in net.parameters())


COUNTED = [
    *MODELS,
    ("digits", '[model]\nkind = "cnn"\nchannels = [4, 8]\nhidden = [6]\nbatch_norm = true\ndropout = 0.2'),
    ("digits", '[model]\nkind = "cnn"\nchannels = [5]\nhidden = []\ninput_dropout = 0.1\nactivation = "tanh"'),
    ("iris", "[model]\nhidden = [8, 4]\nbatch_norm = true\ndropout = 0.3\ninput_dropout = 0.1"),
]


@pytest.mark.parametrize(("source", "model"), COUNTED)
def test_network_counts_equal_the_built_networks_and_torchs_flop_counter(tmp_path, source, model):
    """The counts `recipe run` sizes groups by without torch: parameters as torch counts them,
    every module's output per example as forward hooks on the built network see it, and
    multiply-adds as half the FLOPs of torch.utils.flop_counter (reference: torch's counter,
    2 FLOPs per multiply-add of its convolution and matrix-product formulas)."""
    from torch.utils.flop_counter import FlopCounterMode

    from runner.training.stacked_modules import network_counts as built_counts

    path = write_recipe(tmp_path, f'name = "m"\nseeds = [1]\n[data]\nsource = "{source}"\n{model}\n')
    grid = expand(load_recipe(path))
    spec = next(iter(grid)).spec()
    ds = grid.datasets[spec.data_id]
    shape, n_out = tuple(ds.X.shape[1:]), len(ds.classes)
    counted = network_counts(spec.settings.model, shape, n_out)
    assert counted == built_counts(spec, ds)
    gen = torch.Generator().manual_seed(0)
    net = build_model(spec.settings.model, shape, n_out, gen, gen).eval()
    with FlopCounterMode(display=False) as flops, torch.no_grad():
        net(torch.zeros(1, *shape))
    assert counted[2] * 2 == flops.get_total_flops()


@pytest.mark.slow
def test_the_estimate_bounds_a_real_jobs_peak_memory(tmp_path):
    """A wide MLP (about 17 million parameters) trained with Adam in a fresh process: the
    growth of its peak resident memory (VmHWM: getrusage's maximum survives exec, so a child
    of a large pytest process would start at pytest's peak) over the peak before training stays
    below the estimate, and is large enough (over 100 MB) for the comparison to mean something."""
    path = write_recipe(
        tmp_path,
        """
        name = "wide"
        seeds = [1]
        [data]
        source = "digits"
        [model]
        hidden = [4096, 4096]
        [train]
        optimizer = "adam"
        epochs = 1
        batch_size = 64
        """,
    )
    script = textwrap.dedent(f"""
        import sys
        from runner.recipe.grid import expand
        from runner.recipe.loader import load_recipe
        from runner.training.loop import train_job
        from runner.execution.executors import prepare_process
        grid = expand(load_recipe({str(path)!r}))
        job = grid[0]
        ds = grid.datasets[job.config.data_id]
        prepare_process(1, grid.datasets)
        import torch
        torch.optim.Adam([torch.zeros(1, requires_grad=True)])  # imports done before the baseline
        def peak():  # this process's own high-water mark (getrusage's survives exec from the parent)
            with open("/proc/self/status") as f:
                return next(int(line.split()[1]) for line in f if line.startswith("VmHWM:"))
        before = peak()
        result = train_job(job.spec(), ds)
        after = peak()
        print(result.status.value, (after - before) * 1024)
    """)
    proc = subprocess.run([PYTHON, "-c", script], env=subprocess_env(), capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr
    status, growth = proc.stdout.split()
    grid = expand(load_recipe(path))
    ds = next(iter(grid.datasets.values()))
    estimate = job_bytes(grid.configs[0].settings, len(ds.y), tuple(ds.X.shape[1:]), len(ds.classes))
    assert status == "done"
    assert 100 * 2**20 < int(growth) <= estimate, (int(growth), estimate, PARAM_COPIES)


def test_a_layer_too_large_for_the_machine_is_refused_before_anything_runs(tmp_path):
    path = write_recipe(tmp_path, 'name = "m"\nseeds = [1]\n[data]\nsource = "iris"\n[model]\nhidden = [2000000000]\n')
    for command in ("check", "run"):
        result = invoke(command, path, "--store", tmp_path / "s.sqlite")
        assert result.exit_code == 2 and "Traceback" not in result.stderr
        assert (
            "model.hidden" in result.stderr and "GB of memory" in result.stderr and "this machine has" in result.stderr
        )
    assert not (tmp_path / "s.sqlite").exists()
