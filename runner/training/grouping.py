"""Which jobs train together: work items of one job, or stacked groups of same-shaped jobs.

The stacked path (stacked.py) trains K jobs whose tensor shapes agree as one computation;
``stack_key`` says which jobs agree, ``group_specs`` cuts each bucket into groups bounded by
``GROUP_SIZE`` and by an estimate of the group's memory (``member_bytes``) against
``MEMORY_BUDGET`` per worker process.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from runner.components.optimizers import STACKED_OPTIMIZERS
from runner.datasets.sources import Dataset
from runner.recipe.grid import canonical
from runner.training.job import JobSpec

__all__ = [
    "GROUP_SIZE",
    "MEMORY_BUDGET",
    "Stacked",
    "group_specs",
    "member_bytes",
    "stack_key",
    "training_note",
]

GROUP_SIZE = 16  # members per stacked group: enough to share the per-operation overhead,
# few enough that a small grid still spreads over several workers
MEMORY_BUDGET = 512 * 2**20  # bytes of tensors one stacked group may hold in a worker


class Stacked(tuple):
    """A work item of job specs trained together on the stacked path (even a group of one)."""

    __slots__ = ()


def stack_key(spec: JobSpec) -> str | None:
    """Jobs with equal keys can share one stacked computation; None: this job runs alone."""
    m, t = spec.settings.model, spec.settings.train
    if m.kind == "python" and spec.module is not None:
        return _module_key(spec)
    if m.kind == "cnn":
        return _cnn_key(spec)
    if (
        m.kind != "mlp"
        or t.optimizer not in STACKED_OPTIMIZERS
        or t.checkpoint_every
        or t.time_limit
        or spec.time_limit
        or spec.checkpoint
    ):
        return None
    return canonical(
        {
            "data": spec.data_id,
            "split": spec.settings.data,
            "hidden": m.hidden,
            "act": m.activation,
            "slope": m.leaky_slope,
            "bn": m.batch_norm,  # the stacked network takes it from the group's first member
            "bs": t.batch_size,
            "epochs": t.epochs,
            "monitor": spec.monitor,
        }
    )


# The optimizers whose stacked steps the torch.func backend is tested with against the single
# path (tests/test_stacked_modules.py); rmsprop and adagrad train a user network one job at a time.
MODULE_STACKED_OPTIMIZERS = ("adam", "adamw", "momentum", "nesterov", "sgd")


def _network_key(spec: JobSpec, network: dict) -> str | None:
    """Jobs on the torch.func backend (stacked_modules.py) stack with jobs of the same
    ``network`` (what fixes its shapes and forward pass), data, batch size and epochs."""
    t = spec.settings.train
    if (
        t.optimizer not in MODULE_STACKED_OPTIMIZERS
        or t.checkpoint_every
        or t.time_limit
        or spec.time_limit
        or spec.checkpoint
    ):
        return None
    shared = {"data": spec.data_id, "split": spec.settings.data, "bs": t.batch_size, "epochs": t.epochs,
              "monitor": spec.monitor}  # fmt: skip
    return canonical(shared | network)


def _module_key(spec: JobSpec) -> str | None:
    """A user's network: the same file, class and arguments (so the same shapes)."""
    m = spec.settings.model
    return _network_key(spec, {"module": spec.module.sha256, "class": m.class_name, "args": m.args})


def _cnn_key(spec: JobSpec) -> str | None:
    """The tool's CNN: the same layers and dropout rates; the initializer may differ (each
    member is built with its own)."""
    layers = {k: v for k, v in spec.settings.model.to_dict().items() if k not in ("init", "init_scale")}
    return _network_key(spec, {"cnn": layers})


def member_bytes(spec: JobSpec, ds: Dataset) -> int:
    """A generous estimate of one member's tensors: parameters with gradients, optimizer
    moments, a best-epoch copy and momentum buffer (6 copies), its data, and the activations
    of one mini-batch with their gradients and masks (4 copies of ``per_row`` numbers per
    example). No array is loaded (bundled.py describes a bundled set's shape)."""
    model = spec.settings.model
    if model.kind == "python":  # a user's network: its counts are known once it is built
        from runner.training.stacked_modules import network_counts as built_counts

        params, per_row, _ = built_counts(spec, ds)
    elif model.kind == "cnn":  # counted without torch, as the built network would count them
        from runner.recipe.footprint import network_counts

        params, per_row, _ = network_counts(model, tuple(ds.shape[1:]), max(1, len(ds.classes)))
    else:  # the tool's MLP: each layer's width once
        widths = [int(np.prod(ds.shape[1:])), *model.hidden, max(1, len(ds.classes))]
        params, per_row = sum((a + 1) * b for a, b in zip(widths, widths[1:])), sum(widths)
    bs = spec.settings.train.batch_size
    batch = ds.shape[0] if bs == "full" else min(int(bs), ds.shape[0])
    return 4 * (6 * params + int(np.prod(ds.shape)) + 4 * batch * per_row)


def group_specs(
    specs: Sequence[JobSpec], datasets: dict[str, Dataset], enabled: bool = True
) -> list[tuple[JobSpec, ...]]:
    """Work items over these jobs in their order: stackable jobs in groups of up to
    GROUP_SIZE (fewer when the memory estimate says so), others alone.

    A member's numbers do not depend on its group (its size, its other members, its place
    in it: stacked_network.aligned and the per-member optimizer steps see to that, and
    tests/test_stack.py checks it bit for bit), so the caller may group whatever is left
    to run: a resumed or extended grid trains only its missing jobs."""
    if not enabled:
        return [(s,) for s in specs]
    buckets: dict[str, list[JobSpec]] = {}
    items: list[tuple[JobSpec, ...]] = []
    for spec in specs:
        key = stack_key(spec)
        if key is None:
            items.append((spec,))
        else:
            buckets.setdefault(key, []).append(spec)
    for members in buckets.values():
        cap = max(1, min(GROUP_SIZE, MEMORY_BUDGET // member_bytes(members[0], datasets[members[0].data_id])))
        count = math.ceil(len(members) / cap)  # near-equal groups: 18 jobs -> 9 + 9, not 16 + 2
        cuts = [round(i * len(members) / count) for i in range(count + 1)]
        items += [Stacked(members[a:b]) for a, b in zip(cuts, cuts[1:])]
    return items


def training_note(items: Sequence[tuple[JobSpec, ...]]) -> str:
    """How a run's work items train, in words: "2 stacked groups of 9 jobs, 3 jobs one at a time"."""
    sizes = sorted(len(item) for item in items if isinstance(item, Stacked))
    alone = sum(len(item) for item in items if not isinstance(item, Stacked))
    parts = []
    if sizes:
        span = str(sizes[0]) if sizes[0] == sizes[-1] else f"{sizes[0]}-{sizes[-1]}"
        parts.append(
            f"{len(sizes)} stacked group{'s' if len(sizes) > 1 else ''} of {span} job{'s' if sizes[-1] > 1 else ''}"
        )
    if alone:
        parts.append(f"{alone} job{'s' if alone > 1 else ''} one at a time")
    return "training " + ", ".join(parts)
