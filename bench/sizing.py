"""Benchmark: how long stacked groups take, against execution/sizing.py's estimate of them.

`recipe run` picks its worker count from each group's estimated time (sizing.item_seconds),
so an estimate several times too low trains in this process what two workers would have
trained sooner. Two families of groups, each trained by `recipe run --workers 1` on a fresh
store:
  - the tool's MLP on the stacked path (training/stacked.py): ten groups over digits,
    breast_cancer and diabetes (scikit-learn's bundled sets) and a synthetic 20,000-row CSV
    (bench/wall.py's write_csv; invented numbers), widths 16 to 256, mini-batches of 16 to
    256, sgd, momentum and adam, with and without dropout, groups of 4 to 16;
  - groups stacked through torch.func (training/stacked_modules.py): twelve groups of the
    tool's CNN (narrow and wide channels, kernels of 3 and 5, batch norm, mini-batches of 64
    and 256, groups of 4 and 16) and of users' MLPs and a CNN (tests/data/networks/nets.py).
For each group it prints the stored time, the estimate and their ratio, then refits each
family's constants by non-negative least squares on relative error: the stacked path's
seconds per FLOP, per group step and per member step (STACKED_*), torch.func's seconds per
number a module outputs, per multiply-add and per step (MODULE_*).

Run: python bench/sizing.py [--only stacked|module]
"""

from __future__ import annotations

import argparse
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
from wall import write_csv

from runner.execution import sizing
from runner.execution.estimate import work_items
from runner.recipe.grid import expand
from runner.recipe.loader import load_recipe

ROOT = Path(__file__).resolve().parents[1]
RECIPE = """
name = "sizing-{i}"
seeds = {seeds}
[data]
source = "{source}"
{target}
[model]
{model}
[train]
optimizer = "{optimizer}"
lr = 1e-3
batch_size = {batch}
epochs = {epochs}
[factors]
"train.lr" = [1e-3, 3e-3, 1e-2, 3e-2]
"""
USER = 'kind = "python"\nfile = "nets.py"\n'
# (source, [model] table, seeds (x 4 learning rates = group size), batch size, epochs, optimizer)
STACKED = [
    ("digits", "hidden = [64, 64]", 4, 64, 10, "adam"),
    ("digits", "hidden = [64, 64]", 1, 64, 10, "adam"),
    ("digits", "hidden = [256, 256]", 4, 64, 5, "adam"),
    ("digits", "hidden = [32]", 4, 32, 10, "sgd"),
    ("digits", "hidden = [64, 64]", 4, 256, 20, "adam"),
    ("digits", "hidden = [128, 128]\ndropout = 0.3", 4, 64, 5, "momentum"),
    ("breast_cancer", "hidden = [32, 32]", 4, 32, 20, "adam"),
    ("wall.csv", "hidden = [64, 64]", 4, 64, 5, "adam"),
    ("wall.csv", "hidden = [256]", 2, 128, 3, "adam"),
    ("diabetes", "hidden = [16]", 4, 16, 20, "adam"),
]
MODULE = [
    ("digits", 'kind = "cnn"\nchannels = [8, 16]\nhidden = [32]', 4, 64, 3, "adam"),
    ("digits", 'kind = "cnn"\nchannels = [8, 16]\nhidden = [32]', 1, 64, 3, "adam"),
    ("digits", 'kind = "cnn"\nchannels = [32, 64]\nhidden = [32]', 4, 64, 3, "adam"),
    ("digits", 'kind = "cnn"\nchannels = [4]\nhidden = []', 4, 64, 3, "adam"),
    ("digits", 'kind = "cnn"\nchannels = [8, 16]\nhidden = [32]', 4, 256, 3, "adam"),
    ("digits", 'kind = "cnn"\nchannels = [8, 16]\nhidden = [32]\nbatch_norm = true', 4, 64, 3, "adam"),
    ("digits", 'kind = "cnn"\nchannels = [64, 128]\nkernel_size = 5\nhidden = [32]', 1, 64, 1, "adam"),
    ("digits", 'kind = "cnn"\nchannels = [16, 32]\nkernel_size = 5\nhidden = [32]', 1, 64, 2, "adam"),
    ("digits", USER + 'class_name = "Dense"\nargs = { widths = [64, 128, 128, 10] }', 4, 64, 3, "adam"),
    ("digits", USER + 'class_name = "Dense"\nargs = { widths = [64, 512, 10] }', 4, 64, 3, "adam"),
    (
        "digits",
        USER + 'class_name = "Conv"\nargs = { channels = [8, 16], hidden = [32], classes = 10 }',
        4,
        64,
        3,
        "adam",
    ),
    ("breast_cancer", USER + 'class_name = "Dense"\nargs = { widths = [30, 64, 64, 2] }', 4, 32, 5, "adam"),
]


def measure(folder: Path, i: int, case: tuple) -> dict:
    """Train one case's single group through the CLI; its shapes, estimate and stored time."""
    source, model, seeds, batch, epochs, optimizer = case
    path = folder / f"case{i}.toml"
    target = 'target = "label"' if source.endswith(".csv") else ""
    path.write_text(RECIPE.format(i=i, seeds=list(range(1, seeds + 1)), source=source, target=target, model=model,
                                  batch=batch, epochs=epochs, optimizer=optimizer))  # fmt: skip
    grid = expand(load_recipe(path))
    (item,) = work_items(grid, list(grid), stack=True)
    spec, ds = item[0], grid.datasets[item[0].data_id]
    store = folder / f"case{i}.sqlite"
    env = {**os.environ, "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    command = [sys.executable, "-m", "runner", "run", str(path), "--store", str(store), "--workers", "1", "-q"]
    subprocess.run(command, env=env, check=True, capture_output=True, cwd=folder)
    with sqlite3.connect(store) as c:
        (seconds,) = c.execute("SELECT sum(duration) FROM jobs").fetchone()
    elements, macs = sizing._counts(spec, ds)  # what the estimate itself counts
    split, train = spec.settings.data.split, spec.settings.train
    rows = ds.shape[0]
    n_val = max(1, round(rows * split.val))
    n_train = max(1, rows - n_val - round(rows * split.test))
    return {
        "what": f"{source}: " + model.replace(USER, "user ").replace("\n", "; ") + f"; batch {batch}; {optimizer}",
        "members": len(item),
        "passes": epochs * (3 * n_train + n_val),
        "flops": len(item) * epochs * (6 * macs * n_train + 2 * macs * n_val),
        "steps": epochs * math.ceil(n_train / train.batch_rows(n_train)),
        "elements": elements,
        "macs": macs,
        "estimate": sizing.item_seconds(item, ds),
        "seconds": seconds,
    }


# each family's terms, and the constants sizing.py holds for them
TERMS = {
    "stacked": (lambda r: [r["flops"], r["steps"], r["members"] * r["steps"]],
                ("1 / STACKED_FLOP_RATE", "STACKED_STEP", "STACKED_MEMBER_STEP"),
                lambda: (1 / sizing.STACKED_FLOP_RATE, sizing.STACKED_STEP, sizing.STACKED_MEMBER_STEP)),
    "module": (lambda r: [r["members"] * r["passes"] * r["elements"], r["members"] * r["passes"] * r["macs"],
                          r["steps"]],
               ("MODULE_ELEMENT", "MODULE_MAC", "MODULE_STEP"),
               lambda: (sizing.MODULE_ELEMENT, sizing.MODULE_MAC, sizing.MODULE_STEP)),
}  # fmt: skip


def report(family: str, rows: list[dict]) -> None:
    terms, names, held = TERMS[family]
    print(f"\n{family}: {'group':<86} {'K':>3} {'trained':>8} {'estimate':>8} {'ratio':>6}")
    for r in rows:
        print(f"  {r['what'][:92]:<92} {r['members']:>3} {r['seconds']:>8.2f} {r['estimate']:>8.2f} "
              f"{r['seconds'] / r['estimate']:>6.2f}")  # fmt: skip
    ratios = [r["seconds"] / r["estimate"] for r in rows]
    now = ", ".join(f"{n} {v:.2e}" for n, v in zip(names, held()))
    print(f"  trained / estimated: {min(ratios):.2f} to {max(ratios):.2f} with sizing.py's {now}")
    a = np.array([terms(r) for r in rows], dtype=float)
    y = np.array([r["seconds"] for r in rows])
    fit, _ = nnls(a / y[:, None], np.ones(len(y)))  # least squares on relative error
    refit = y / (a @ fit)
    print(
        f"  refit on this run: {', '.join(f'{n} {v:.2e}' for n, v in zip(names, fit))}; "
        f"trained / refit {refit.min():.2f} to {refit.max():.2f}"
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--only", choices=("stacked", "module"))
    args = parser.parse_args()
    start = time.perf_counter()
    lines = Path("/proc/cpuinfo").read_text().splitlines() if Path("/proc/cpuinfo").exists() else []
    cpu = next((ln.split(":", 1)[1].strip() for ln in lines if ln.startswith("model name")), "?")
    print(f"# bench/sizing.py, {time.strftime('%Y-%m-%d %H:%M')}, {cpu}, {os.cpu_count()} CPUs")
    families = {"stacked": STACKED, "module": MODULE}
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        (folder / "nets.py").write_text((ROOT / "tests" / "data" / "networks" / "nets.py").read_text())
        write_csv(folder / "wall.csv")
        for family, cases in families.items():
            if args.only in (None, family):
                report(family, [measure(folder, i, case) for i, case in enumerate(cases)])
    print(f"\n{time.perf_counter() - start:.0f} s")


if __name__ == "__main__":
    main()
