"""How much memory one job needs, estimated before anything runs.

A layer of a billion units validates as "a whole number >= 1" and then fails every job on
allocation, minutes into a run. ``check_footprint`` refuses such a configuration while the
recipe is validated, with the estimate and the limit in the message. The estimate is
deliberately generous (a job near the limit is refused rather than killed later) and needs
no torch: it counts the numbers a job holds, at 4 bytes each (float32).
"""

from __future__ import annotations

import contextlib
import math
import os
from pathlib import Path

from runner.errors import RecipeError
from runner.recipe.settings import Settings

__all__ = ["check_footprint", "job_bytes", "memory_limit", "model_size"]

# Copies of every parameter a job holds at once: the weights, their gradients, two optimizer
# moments (Adam), the whole-size temporaries of torch's multi-tensor optimizer step (two),
# a best-epoch copy (early stopping) and one for a checkpoint being written.
# tests/test_footprint.py holds a real job's peak memory under this estimate.
PARAM_COPIES = 8
# Per example of a mini-batch, each layer's output is kept with its activation, their
# gradients and a dropout mask.
ACTIVATION_COPIES = 4


def model_size(settings: Settings, in_shape: tuple[int, ...], n_out: int) -> tuple[int, list[int]]:
    """(parameter count, each layer's output size per example) of the model, as built by
    training/models.py: conv layers with same padding and optional 2x2 pooling, then dense."""
    m = settings.model
    params, sizes = 0, []
    if m.kind == "cnn" and len(in_shape) == 3:
        channels, height, width = in_shape
        k = m.kernel_size
        for c in m.channels:
            params += (channels * k * k + 1) * c
            height, width = height + 2 * (k // 2) - k + 1, width + 2 * (k // 2) - k + 1
            sizes.append(c * height * width)
            if m.pool != "none" and min(height, width) >= 2:
                height, width = height // 2, width // 2
            channels = c
        width_in = channels * height * width
    else:
        width_in = math.prod(in_shape)
    for h in (*m.hidden, n_out):
        params += (width_in + 1) * h
        sizes.append(h)
        width_in = h
    return params, sizes


def job_bytes(settings: Settings, rows: int, in_shape: tuple[int, ...], n_out: int) -> int:
    """Bytes one job holds at its peak: parameter copies, a mini-batch's activations, one
    evaluation pass over all ``rows`` (the largest layer at a time) and the data itself."""
    params, sizes = model_size(settings, in_shape, n_out)
    bs = settings.train.batch_size
    batch = rows if bs == "full" else min(int(bs), rows)
    features = math.prod(in_shape)
    numbers = (
        PARAM_COPIES * params
        + ACTIVATION_COPIES * batch * (features + sum(sizes))
        + 2 * rows * max(sizes, default=1)
        + rows * features
    )
    return 4 * numbers


def memory_limit() -> int | None:
    """Bytes of memory this machine (or this container's cgroup) allows; None if unknown."""
    limits = []
    with contextlib.suppress(ValueError, OSError, AttributeError):
        limits.append(os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES"))
    for name in ("/sys/fs/cgroup/memory.max", "/sys/fs/cgroup/memory/memory.limit_in_bytes"):
        try:
            text = Path(name).read_text().strip()
        except OSError:
            continue
        if text.isdigit():
            limits.append(int(text))
    return min(limits) if limits else None


def _gb(n: int) -> str:
    return f"{n / 2**30:,.1f} GB" if n >= 2**30 else f"{n / 2**20:,.0f} MB"


def check_footprint(settings: Settings, rows: int, in_shape: tuple[int, ...], n_out: int) -> None:
    """RecipeError when one job of these settings would need more memory than the machine has."""
    limit = memory_limit()
    if limit is None:
        return
    need = job_bytes(settings, rows, in_shape, n_out)
    if need <= limit:
        return
    key = "model.channels" if settings.model.kind == "cnn" and len(in_shape) == 3 else "model.hidden"
    raise RecipeError(
        f"one job would need about {_gb(need)} of memory (parameters, gradients and optimizer "
        f"state, one batch's activations, the data), more than the {_gb(limit)} this machine has",
        key=key,
        value=list(getattr(settings.model, key.split(".")[1])),
        allowed=f"a model whose job fits in {_gb(limit)}",
        hint="Use narrower or fewer layers, or a smaller batch size",
    )
