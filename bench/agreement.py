"""How closely the stacked path agrees with the single-job path: relative differences of
every member's first-epoch train and val losses over the 32 mixed configurations of
tests/test_stack.py (MIXED), and over the same grid with rmsprop and adagrad.

Run: python bench/agreement.py   (from any checkout: it measures the tree it sits in)
"""

from __future__ import annotations

import sys
import textwrap
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from runner.execution.executors import prepare_process  # noqa: E402
from runner.recipe.grid import expand  # noqa: E402
from runner.recipe.loader import parse_recipe  # noqa: E402
from runner.training.loop import train_group, train_job  # noqa: E402

MIXED = """
name = "mixed"
seeds = [1, 2]
[data]
source = "digits"
[model]
hidden = [64, 64]
[train]
optimizer = "adam"
epochs = 1
batch_size = 32
clip_norm = 2.0
schedule = "cosine"
[factors]
"train.lr" = [1e-3, 3e-3]
"model.dropout" = [0.0, 0.2]
"train.l2" = [0.0, 1e-4]
{last}
"""
GRIDS = {
    "adam, 2 inits (tests/test_stack.py)": '"model.init" = ["glorot_uniform", "he_normal"]',
    "rmsprop and adagrad": '"train.optimizer" = ["rmsprop", "adagrad"]',
}


def main() -> None:
    for name, last in GRIDS.items():
        grid = expand(parse_recipe(textwrap.dedent(MIXED.format(last=last)), ROOT / "bench" / "agree.toml"))
        prepare_process(1, grid.datasets)
        specs = [j.spec() for j in grid]
        ds = grid.datasets[specs[0].data_id]
        try:
            stacked = train_group(specs, ds)
        except Exception as exc:  # a tree whose stacked path lacks an optimizer
            print(f"{name}: {type(exc).__name__}: {exc}")
            continue
        if any(r.notes for r in stacked):
            print(f"{name}: not stacked in this tree ({stacked[0].notes[0][:80]})")
            continue
        rel = []
        for spec, r in zip(specs, stacked):
            single = train_job(spec, ds)
            for curve in ("train_loss", "val_loss"):
                rel += [abs(a - b) / abs(b) for a, b in zip(r.curves[curve], single.curves[curve])]
        rel = np.array(rel)
        print(
            f"{name}: {len(specs)} members, relative difference of first-epoch losses: median {np.median(rel):.2g}, "
            f"max {rel.max():.2g}, members over 1e-5: {int((rel.reshape(-1, 2).max(axis=1) > 1e-5).sum())}"
        )


if __name__ == "__main__":
    main()
