"""Benchmark: 16 same-shaped jobs of a user's own network (model.kind = "python"), trained one
at a time on the single path and together on the torch.func stacked path, timed in one run.

Grid M: the MLP 64-128-128-10 of bench/stacking.py's grid A, written as a user module
  (nn.Sequential of Linear and ReLU), on digits, batch 64, 10 epochs, Adam lr 1e-3, 16 seeds.
Grid C: a small CNN written as a user module (conv 1->8->16, 3x3, ReLU, 2x2 max pooling,
  then Linear 64->10) on the digits images, same training settings.
For context, grid M is also timed with model.kind = "mlp" on the tool's own stacked path.

One thread in one process. After one untimed pass of each path (imports, first kernels), the
paths alternate within each of ROUNDS rounds, so each round's ratio is paired (both measured
in the same few seconds of this shared machine's load); it prints each round's times, the
median of the paired ratios and the best of rounds, and how far the two paths' final
metrics are apart.

Run: python bench/user_modules.py [ROUNDS]   (default 3)
"""

from __future__ import annotations

import statistics
import sys
import tempfile
import textwrap
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from runner.execution.executors import prepare_process  # noqa: E402
from runner.recipe.grid import expand  # noqa: E402
from runner.recipe.loader import parse_recipe  # noqa: E402
from runner.training.grouping import Stacked, group_specs  # noqa: E402
from runner.training.loop import train_group, train_job  # noqa: E402

NETWORKS = """
from torch import nn


class Dense(nn.Module):
    def __init__(self, widths):
        super().__init__()
        layers = [nn.Flatten()]
        for a, b in zip(widths, widths[1:]):
            layers += [nn.Linear(a, b), nn.ReLU()]
        self.body = nn.Sequential(*layers[:-1])  # no activation after the output layer

    def forward(self, x):
        return self.body(x)


class Small(nn.Module):
    def __init__(self, channels, classes):
        super().__init__()
        a, b = channels
        self.features = nn.Sequential(
            nn.Conv2d(1, a, 3, padding=1), nn.ReLU(), nn.MaxPool2d(2),
            nn.Conv2d(a, b, 3, padding=1), nn.ReLU(), nn.MaxPool2d(2),
        )
        self.head = nn.Linear(b * 2 * 2, classes)

    def forward(self, x):
        return self.head(self.features(x).flatten(1))
"""

COMMON = """
name = "bench"
seeds = [{seeds}]
[data]
source = "digits"
split = {{ val = 0.2, test = 0.0 }}
[train]
optimizer = "adam"
lr = 1e-3
batch_size = 64
epochs = 10
"""
SEEDS = ", ".join(str(s) for s in range(1, 17))
GRIDS = {
    "M: user MLP 64-128-128-10": '[model]\nkind = "python"\nfile = "nets.py"\nclass_name = "Dense"\n'
    "args = { widths = [64, 128, 128, 10] }\n",
    "C: user CNN 8-16 + linear": '[model]\nkind = "python"\nfile = "nets.py"\nclass_name = "Small"\n'
    "args = { channels = [8, 16], classes = 10 }\n",
    "M as model.kind = mlp": "[model]\nhidden = [128, 128]\n",
}


def grid_of(folder: Path, head: str):
    text = COMMON.format(seeds=SEEDS) + head
    return expand(parse_recipe(text, folder / "bench.toml"))


def one_at_a_time(specs, ds) -> tuple[float, list]:
    start = time.perf_counter()
    results = [train_job(s, ds) for s in specs]
    return time.perf_counter() - start, results


def stacked(specs, ds) -> tuple[float, list]:
    start = time.perf_counter()
    results = train_group(specs, ds)
    return time.perf_counter() - start, results


def agreement(a: list, b: list) -> float:
    """Largest relative difference of the final val log-loss between two paths' results."""
    worst = 0.0
    for ra, rb in zip(a, b):
        x, y = ra.metrics["val"]["log_loss"], rb.metrics["val"]["log_loss"]
        worst = max(worst, abs(x - y) / max(abs(x), 1e-12))
    return worst


def main() -> None:
    rounds = int(sys.argv[1]) if len(sys.argv) > 1 else 3
    folder = Path(tempfile.mkdtemp(prefix="bench-modules-"))
    (folder / "nets.py").write_text(textwrap.dedent(NETWORKS))
    print(f"{rounds} rounds; one thread; 16 jobs per grid; times in seconds\n")
    for name, head in GRIDS.items():
        grid = grid_of(folder, head)
        prepare_process(1, grid.datasets)
        specs = [job.spec() for job in grid]
        ds = grid.datasets[specs[0].data_id]
        items = group_specs(specs, grid.datasets)
        assert len(items) == 1 and isinstance(items[0], Stacked), f"{name}: not one stacked group"
        one_at_a_time(specs[:1], ds)  # untimed: imports and first kernels of both paths
        stacked(specs[:2], ds)
        singles, stacks, ratios = [], [], []
        for r in range(rounds):
            t1, res1 = one_at_a_time(specs, ds)
            t2, res2 = stacked(specs, ds)
            notes = [n for res in res2 for n in res.notes]
            assert not notes, notes[0]
            singles.append(t1)
            stacks.append(t2)
            ratios.append(t1 / t2)
            print(f"{name:28s} round {r + 1}: one at a time {t1:6.2f}  stacked {t2:6.2f}  ratio {t1 / t2:5.2f}")
        print(
            f"{name:28s} best: one at a time {min(singles):6.2f}  stacked {min(stacks):6.2f}  "
            f"({16 * 60 / min(singles):.0f} and {16 * 60 / min(stacks):.0f} jobs/min); "
            f"paired ratio median {statistics.median(ratios):.2f} (range {min(ratios):.2f}-{max(ratios):.2f}); "
            f"val log-loss agreement {agreement(res1, res2):.1e}\n"
        )


if __name__ == "__main__":
    main()
