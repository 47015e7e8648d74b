"""How many local worker processes a plan should use when `recipe run` is not told.

Workers pay for themselves only with enough work: a pool costs its fork server's imports
(about what this process's own imports would cost to train here instead), forking, the
data sent to each worker and each worker's first calls, and two busy processes on a small
machine each run slower than one alone (bench/two_workers.py measures by how much). So each
work item's training time is estimated from its shapes (no probe: `recipe check` probes),
the items are dealt to W workers longest first, and the W with the least predicted wall
time wins, one worker (this process, no pool) on ties. bench/wall.py checks the choice
against `--workers 1` on grids of 1 to 256 jobs.
"""

from __future__ import annotations

import heapq
import math
from collections.abc import Sequence

from runner.datasets.sources import Dataset
from runner.recipe.footprint import network_counts
from runner.training.job import JobSpec

__all__ = ["LONG_ITEM", "choose_workers", "cut_long_groups", "item_seconds", "predicted_wall"]

# The constants are rough on purpose (the choice only has to be right away from the break-
# even point, where both choices cost about the same); their measurements are in
# bench/RESULTS.md ("Choosing the worker count", "Sizing groups stacked through torch.func").
# The stacked path's constants are fitted by bench/sizing.py on a 2-core AMD EPYC whose
# float32 products run at 35 GFLOP/s, slower than most machines: elsewhere the estimates
# run high, which errs toward workers, whose cost when wrong is bounded by a pool's start
# (POOL_START), where erring toward this process can cost half the training.
FLOP_RATE = 20e9  # arithmetic per second of a single job's training step, one core
STACKED_FLOP_RATE = 14e9  # the same of a stacked group's, all its work per FLOP of products
STACKED_STEP = 350e-6  # seconds of per-call overhead per stacked group step (plus per member)
STACKED_MEMBER_STEP = 30e-6
SINGLE_STEP = 500e-6  # the single-job path: autograd and torch.optim per step
# Groups stacked through torch.func (the tool's CNN, users' networks) spend their time in
# per-number work (vmap's convolutions, pooling, activations, batch norm), not in products:
# seconds per number a module outputs, and per multiply-add, for each example a member's
# pass sees (a training example counts 3 passes: forward, backward, update; a validation
# example 1); and per step of the group. Fitted to 12 groups of 0.5 to 13 s (0.68-1.36x of the
# trained time over two runs of bench/sizing.py).
MODULE_ELEMENT = 7.1e-9
MODULE_MAC = 8.3e-11
MODULE_STEP = 4.7e-3
POOL_START = 0.5  # seconds a pool adds: forking, sending data, each worker's first calls
BUSY_SLOWDOWN = 1.4  # each of several busy workers runs this much slower than one alone
LONG_ITEM = 60.0  # seconds: a stacked group estimated longer is cut (cut_long_groups)
MIN_MEMBERS = 4  # a group's time per member is about flat from here up (bench/RESULTS.md)


def _counts(spec: JobSpec, ds: Dataset) -> tuple[int, int]:
    """(numbers all the network's modules output per example, multiply-adds per example).
    The tool's own networks are counted without torch; a user's network is built once (the
    process that validated it has torch already)."""
    model = spec.settings.model
    if model.kind == "python":
        from runner.training.stacked_modules import network_counts as built_counts

        # built on one example in eval mode, as grouping.member_bytes builds it; a network
        # that cannot run that way may still train, and an estimate must not stop the run
        try:
            _, elements, macs = built_counts(spec, ds)
        except Exception:
            return 0, 0  # only its steps are counted
        return elements, macs
    _, elements, macs = network_counts(model, tuple(ds.shape[1:]), max(1, len(ds.classes)))
    return elements, macs


def item_seconds(item: Sequence[JobSpec], ds: Dataset) -> float:
    """Estimated seconds to train a work item (a stacked group or a single job) on one core."""
    from runner.training.grouping import Stacked

    spec = item[0]
    split, train = spec.settings.data.split, spec.settings.train
    rows = ds.shape[0]
    n_val = max(1, round(rows * split.val))
    n_train = max(1, rows - n_val - round(rows * split.test))
    steps = train.epochs * math.ceil(n_train / train.batch_rows(n_train))
    elements, macs = _counts(spec, ds)
    if isinstance(item, Stacked) and spec.settings.model.kind in ("cnn", "python"):
        passes = train.epochs * (3 * n_train + n_val)
        return len(item) * passes * (elements * MODULE_ELEMENT + macs * MODULE_MAC) + steps * MODULE_STEP
    flops = len(item) * train.epochs * (6 * macs * n_train + 2 * macs * n_val)
    if isinstance(item, Stacked):
        return flops / STACKED_FLOP_RATE + steps * (STACKED_STEP + len(item) * STACKED_MEMBER_STEP)
    return flops / FLOP_RATE + len(item) * steps * SINGLE_STEP


def predicted_wall(costs: Sequence[float], workers: int) -> float:
    """Seconds until the last of these items is done on ``workers`` processes: dealt
    longest first, each to the least loaded; a pool's start and slowdown included."""
    if workers <= 1:
        return sum(costs)
    loads = [0.0] * workers
    for cost in sorted(costs, reverse=True):
        heapq.heapreplace(loads, loads[0] + cost)
    return POOL_START + max(loads) * BUSY_SLOWDOWN


def choose_workers(items: Sequence[Sequence[JobSpec]], datasets: dict[str, Dataset], cores: int) -> int:
    """The worker count with the least predicted wall time, at most one per core and per
    item; 1 means this process trains everything itself."""
    costs = [item_seconds(item, datasets[item[0].data_id]) for item in items]
    best, best_wall = 1, predicted_wall(costs, 1)
    for w in range(2, min(cores, len(items)) + 1):
        wall = predicted_wall(costs, w)
        if wall < best_wall:
            best, best_wall = w, wall
    return best


def cut_long_groups(items: list, datasets: dict[str, Dataset]) -> list:
    """Stacked groups estimated to train longer than LONG_ITEM seconds, cut into near-equal
    groups of at least MIN_MEMBERS. A group's results are stored together when it ends, so
    Ctrl-C (or a worker's death) costs the group's whole time so far: shorter groups bound
    that loss and spread better over workers, and a member's numbers do not depend on its
    group (grouping.group_specs), so cutting changes no result."""
    from runner.training.grouping import Stacked

    out = []
    for item in items:
        seconds = item_seconds(item, datasets[item[0].data_id]) if isinstance(item, Stacked) else 0.0
        parts = min(math.ceil(seconds / LONG_ITEM), len(item) // MIN_MEMBERS)
        if parts <= 1:
            out.append(item)
            continue
        cuts = [round(i * len(item) / parts) for i in range(parts + 1)]
        out += [Stacked(item[a:b]) for a, b in zip(cuts, cuts[1:])]
    return out
