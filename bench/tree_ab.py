"""Benchmark: the stacked path's training time in this tree against another checkout of the
project, paired: one child process per tree, both pinned to the same CPU, asked in turn to
train the same stacked group once, ROUNDS times; each round's ratio compares two runs made
seconds apart, so the machine's slow and fast phases cancel out of the median ratio.

Used to price a change to the stacked step (e.g. making members independent of their
group): check out the code before it (git worktree add /tmp/before COMMIT) and run
  python bench/tree_ab.py /tmp/before [--rounds N]
Grids: bench/stacking.py's A (16 Adam jobs, digits, 64-128-128-10, batch 64, 10 epochs)
and B (sgd / momentum / adam x L2 0 / 1e-4 x 3 seeds).
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

CHILD = r"""
import sys, textwrap, time
from pathlib import Path
from runner.execution.executors import prepare_process
from runner.recipe.grid import expand
from runner.recipe.loader import parse_recipe
from runner.training.loop import train_group
grid = expand(parse_recipe(textwrap.dedent(sys.argv[1]), Path(sys.argv[2]) / "ab.toml"))
prepare_process(1, grid.datasets)
specs = [j.spec() for j in grid]
ds = grid.datasets[specs[0].data_id]
train_group(specs, ds)
print("ready", flush=True)
for line in sys.stdin:
    start = time.perf_counter()
    results = train_group(specs, ds)
    assert not results[0].notes, results[0].notes
    print(time.perf_counter() - start, flush=True)
"""


def child(tree: Path, grid: str, core: int) -> subprocess.Popen:
    env = {**os.environ, "PYTHONPATH": str(tree)}
    proc = subprocess.Popen(
        ["taskset", "-c", str(core), sys.executable, "-c", CHILD, grid, str(tree)],
        stdin=subprocess.PIPE,
        stdout=subprocess.PIPE,
        text=True,
        env=env,
    )
    assert proc.stdout.readline().strip() == "ready"
    return proc


def ask(proc: subprocess.Popen) -> float:
    proc.stdin.write("run\n")
    proc.stdin.flush()
    return float(proc.stdout.readline())


def main() -> None:
    from bench.stacking import GRID_A, GRID_B

    parser = argparse.ArgumentParser()
    parser.add_argument("other", type=Path, help="another checkout of the project")
    parser.add_argument("--rounds", type=int, default=8)
    args = parser.parse_args()
    core = min(os.sched_getaffinity(0))
    print(
        f"# bench/tree_ab.py, {time.strftime('%Y-%m-%d %H:%M')}, this tree vs {args.other}, CPU {core}, "
        f"load {os.getloadavg()[0]:.2f}"
    )
    for name, grid in (("A", GRID_A), ("B", GRID_B)):
        ours, theirs = child(ROOT, grid, core), child(args.other, grid, core)
        ratios, mine, other = [], [], []
        for r in range(args.rounds):
            a, b = (ask(ours), ask(theirs)) if r % 2 == 0 else (ask(theirs), ask(ours))[::-1]
            mine.append(a)
            other.append(b)
            ratios.append(a / b)
        for proc in (ours, theirs):
            proc.stdin.close()
            proc.wait()
        print(
            f"grid {name}: this tree {min(mine):.3f} s, other {min(other):.3f} s (least of {args.rounds}); "
            f"this / other, median of paired rounds {statistics.median(ratios):.3f} "
            f"(range {min(ratios):.3f}-{max(ratios):.3f})"
        )


if __name__ == "__main__":
    main()
