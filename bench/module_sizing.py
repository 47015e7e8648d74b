"""Benchmark: how long groups stacked through torch.func take, against execution/sizing.py's estimate.

The tool's CNN and users' networks stack through torch.func (training/stacked_modules.py).
`recipe run` picks its worker count from each group's estimated time (sizing.item_seconds),
so an estimate several times too low trains in this process what two workers would have
trained sooner. For twelve groups (the tool's CNN with narrow and wide channels, kernels of
3 and 5, batch norm, mini-batches of 64 and 256, groups of 4 and 16; users' MLPs and a CNN
from tests/data/networks/nets.py; digits and breast_cancer, scikit-learn's bundled sets),
each trained by `recipe run --workers 1` on a fresh store, it prints the group's stored
time, its estimate and their ratio, then refits the three constants (seconds per number a
module outputs, per multiply-add, per step) by non-negative least squares on relative error.

Run: python bench/module_sizing.py
"""

from __future__ import annotations

import math
import os
import sqlite3
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from scipy.optimize import nnls

from runner.execution import sizing
from runner.execution.estimate import work_items
from runner.recipe.grid import expand
from runner.recipe.loader import load_recipe
from runner.training.stacked_modules import network_counts

ROOT = Path(__file__).resolve().parents[1]
RECIPE = """
name = "sizing-{i}"
seeds = {seeds}
[data]
source = "{source}"
[model]
{model}
[train]
optimizer = "adam"
lr = 1e-3
batch_size = {batch}
epochs = {epochs}
[factors]
"train.lr" = [1e-3, 3e-3, 1e-2, 3e-2]
"""
USER = 'kind = "python"\nfile = "nets.py"\n'
# (source, [model] table, seeds (x 4 learning rates = group size), batch size, epochs)
CASES = [
    ("digits", 'kind = "cnn"\nchannels = [8, 16]\nhidden = [32]', 4, 64, 3),
    ("digits", 'kind = "cnn"\nchannels = [8, 16]\nhidden = [32]', 1, 64, 3),
    ("digits", 'kind = "cnn"\nchannels = [32, 64]\nhidden = [32]', 4, 64, 3),
    ("digits", 'kind = "cnn"\nchannels = [4]\nhidden = []', 4, 64, 3),
    ("digits", 'kind = "cnn"\nchannels = [8, 16]\nhidden = [32]', 4, 256, 3),
    ("digits", 'kind = "cnn"\nchannels = [8, 16]\nhidden = [32]\nbatch_norm = true', 4, 64, 3),
    ("digits", 'kind = "cnn"\nchannels = [64, 128]\nkernel_size = 5\nhidden = [32]', 1, 64, 1),
    ("digits", 'kind = "cnn"\nchannels = [16, 32]\nkernel_size = 5\nhidden = [32]', 1, 64, 2),
    ("digits", USER + 'class_name = "Dense"\nargs = { widths = [64, 128, 128, 10] }', 4, 64, 3),
    ("digits", USER + 'class_name = "Dense"\nargs = { widths = [64, 512, 10] }', 4, 64, 3),
    ("digits", USER + 'class_name = "Conv"\nargs = { channels = [8, 16], hidden = [32], classes = 10 }', 4, 64, 3),
    ("breast_cancer", USER + 'class_name = "Dense"\nargs = { widths = [30, 64, 64, 2] }', 4, 32, 5),
]


def measure(folder: Path, i: int, case: tuple) -> dict:
    """Train one case's single group through the CLI; its shapes, estimate and stored time."""
    source, model, seeds, batch, epochs = case
    path = folder / f"case{i}.toml"
    path.write_text(RECIPE.format(i=i, seeds=list(range(1, seeds + 1)), source=source, model=model, batch=batch,
                                  epochs=epochs))  # fmt: skip
    grid = expand(load_recipe(path))
    (item,) = work_items(grid, list(grid), stack=True)
    spec, ds = item[0], grid.datasets[item[0].data_id]
    store = folder / f"case{i}.sqlite"
    env = {**os.environ, "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    command = [sys.executable, "-m", "runner", "run", str(path), "--store", str(store), "--workers", "1", "-q"]
    subprocess.run(command, env=env, check=True, capture_output=True, cwd=folder)
    with sqlite3.connect(store) as c:
        (seconds,) = c.execute("SELECT sum(duration) FROM jobs").fetchone()
    _, elements, macs = network_counts(spec, ds)
    split, train = spec.settings.data.split, spec.settings.train
    rows = ds.shape[0]
    n_val = max(1, round(rows * split.val))
    n_train = max(1, rows - n_val - round(rows * split.test))
    return {
        "what": model.replace(USER, "user ").replace("\n", "; "),
        "members": len(item),
        "passes": epochs * (3 * n_train + n_val),
        "steps": epochs * math.ceil(n_train / train.batch_rows(n_train)),
        "elements": elements,
        "macs": macs,
        "estimate": sizing.item_seconds(item, ds),
        "seconds": seconds,
    }


def main() -> None:
    start = time.perf_counter()
    lines = Path("/proc/cpuinfo").read_text().splitlines() if Path("/proc/cpuinfo").exists() else []
    cpu = next((ln.split(":", 1)[1].strip() for ln in lines if ln.startswith("model name")), "?")
    print(f"# bench/module_sizing.py, {time.strftime('%Y-%m-%d %H:%M')}, {cpu}, {os.cpu_count()} CPUs")
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        (folder / "nets.py").write_text((ROOT / "tests" / "data" / "networks" / "nets.py").read_text())
        rows = [measure(folder, i, case) for i, case in enumerate(CASES)]
    print(f"{'group':<72} {'K':>3} {'elements':>8} {'macs':>8} {'trained':>8} {'estimate':>8} {'ratio':>6}")
    for r in rows:
        print(f"{r['what'][:72]:<72} {r['members']:>3} {r['elements']:>8} {r['macs']:>8} {r['seconds']:>8.2f} "
              f"{r['estimate']:>8.2f} {r['seconds'] / r['estimate']:>6.2f}")  # fmt: skip
    ratios = [r["seconds"] / r["estimate"] for r in rows]
    print(f"trained / estimated: {min(ratios):.2f} to {max(ratios):.2f} with the constants in sizing.py "
          f"(MODULE_ELEMENT {sizing.MODULE_ELEMENT:.2e}, MODULE_MAC {sizing.MODULE_MAC:.2e}, "
          f"MODULE_STEP {sizing.MODULE_STEP:.2e})")  # fmt: skip
    a = np.array([[r["members"] * r["passes"] * r["elements"], r["members"] * r["passes"] * r["macs"], r["steps"]]
                  for r in rows], dtype=float)  # fmt: skip
    y = np.array([r["seconds"] for r in rows])
    fit, _ = nnls(a / y[:, None], np.ones(len(y)))  # least squares on relative error
    refit = y / (a @ fit)
    print(
        f"refit on this run: element {fit[0]:.2e}, mac {fit[1]:.2e}, step {fit[2]:.2e}; "
        f"trained / refit {refit.min():.2f} to {refit.max():.2f}; {time.perf_counter() - start:.0f} s"
    )


if __name__ == "__main__":
    main()
