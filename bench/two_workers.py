"""Benchmark: what a second busy process costs the first on this machine.

The same fixed piece of work is timed in one process alone, then in two processes at once
(started together behind a barrier), alternating for ROUNDS rounds; the ratio of the
pair's per-process time to the lone time says how much slower each of two busy workers
runs. Three kinds of work tell the causes apart:
  - compute: 64x64 float32 matrix products through numpy's BLAS, one thread (the operands
    stay in the core's own cache: no memory traffic);
  - memory: copying a 64 MB array (bound by memory bandwidth);
  - stacked: one stacked group of 16 digits MLPs trained for 3 epochs (the tool's work).
If compute alone runs ~1.4x slower in a pair, the two logical CPUs share one core's
execution units (SMT siblings, or a hypervisor that schedules them so), and nothing in the
tool can win that back; if only memory does, bandwidth is the limit.

Run: python bench/two_workers.py [--rounds N]
"""

from __future__ import annotations

import argparse
import multiprocessing as mp
import os
import statistics
import sys
import textwrap
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

STACKED = """
name = "pair"
seeds = [1, 2, 3, 4]
[data]
source = "digits"
[model]
hidden = [64, 64]
[train]
batch_size = 64
epochs = 3
[factors]
"train.lr" = [1e-3, 3e-3, 1e-2, 3e-2]
"""


def _compute() -> None:
    import numpy as np

    a = np.random.default_rng(0).standard_normal((64, 64), dtype=np.float32)
    out = np.empty_like(a)
    for _ in range(40_000):
        np.matmul(a, a, out=out)


def _memory() -> None:
    import numpy as np

    src = np.ones(16 * 2**20, dtype=np.float32)
    dst = np.empty_like(src)
    for _ in range(60):
        np.copyto(dst, src)


_GROUP = None


def _stacked_setup() -> None:
    global _GROUP
    from runner.execution.executors import prepare_process
    from runner.recipe.grid import expand
    from runner.recipe.loader import parse_recipe
    from runner.training.grouping import Stacked

    grid = expand(parse_recipe(textwrap.dedent(STACKED), ROOT / "bench" / "pair.toml"))
    prepare_process(1, grid.datasets)
    _GROUP = (Stacked(j.spec() for j in grid), grid.datasets)
    _stacked()  # first calls of every kernel, outside the clock


def _stacked() -> None:
    from runner.training.loop import train_item

    train_item(*_GROUP)


KINDS = {"compute": (None, _compute), "memory": (None, _memory), "stacked": (_stacked_setup, _stacked)}


def _child(kind: str, barrier, out) -> None:
    from threadpoolctl import threadpool_limits

    threadpool_limits(1)
    os.environ["OMP_NUM_THREADS"] = "1"
    setup, work = KINDS[kind]
    if setup:
        setup()
    barrier.wait()
    start = time.perf_counter()
    work()
    out.put(time.perf_counter() - start)


def timed(kind: str, processes: int) -> float:
    """Mean seconds of one piece of work when ``processes`` run it at once."""
    ctx = mp.get_context("spawn")
    barrier, out = ctx.Barrier(processes), ctx.Queue()
    procs = [ctx.Process(target=_child, args=(kind, barrier, out)) for _ in range(processes)]
    for p in procs:
        p.start()
    times = [out.get() for _ in procs]
    for p in procs:
        p.join()
    return statistics.fmean(times)


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--rounds", type=int, default=4)
    args = parser.parse_args()
    print(f"# bench/two_workers.py, {time.strftime('%Y-%m-%d %H:%M')}, {os.cpu_count()} CPUs, load {os.getloadavg()}")
    print(f"# per-process time of two at once / one alone; {args.rounds} alternating rounds, median and range")
    for kind in KINDS:
        ratios, alone_times = [], []
        for r in range(args.rounds):
            if r % 2 == 0:
                alone, pair = timed(kind, 1), timed(kind, 2)
            else:
                pair, alone = timed(kind, 2), timed(kind, 1)
            ratios.append(pair / alone)
            alone_times.append(alone)
        print(
            f"{kind:<8} alone {statistics.median(alone_times):6.2f} s   pair/alone {statistics.median(ratios):.2f} "
            f"(range {min(ratios):.2f}-{max(ratios):.2f})   so two workers do {2 / statistics.median(ratios):.2f}x "
            f"the work of one"
        )
        sys.stdout.flush()


if __name__ == "__main__":
    main()
