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
from runner.recipe.settings import ModelSettings, Settings

__all__ = ["check_footprint", "job_bytes", "memory_limit", "model_size", "network_counts"]

# Copies of every parameter a job holds at once: the weights, their gradients, two optimizer
# moments (Adam), the whole-size temporaries of torch's multi-tensor optimizer step (two),
# a best-epoch copy (early stopping) and one for a checkpoint being written.
# tests/test_footprint.py holds a real job's peak memory under this estimate.
PARAM_COPIES = 8
# Per example of a mini-batch, each layer's output is kept with its activation, their
# gradients and a dropout mask.
ACTIVATION_COPIES = 4


def _conv_layers(model: ModelSettings, in_shape: tuple[int, ...]) -> tuple[list[tuple[int, int, int, int]], int]:
    """The tool's conv layers as training/models.py builds them (same padding, optional 2x2
    pooling): per layer (channels in, channels out, numbers it outputs per example, numbers
    after its pooling, 0 without), and the width the dense layers then see. An MLP (or a
    CNN on data that is not images, refused by grid.py) has none."""
    if model.kind != "cnn" or len(in_shape) != 3:
        return [], math.prod(in_shape)
    layers = []
    channels, height, width = in_shape
    k = model.kernel_size
    for c in model.channels:
        height, width = height + 2 * (k // 2) - k + 1, width + 2 * (k // 2) - k + 1
        out, pooled = c * height * width, 0
        if model.pool != "none" and min(height, width) >= 2:
            height, width = height // 2, width // 2
            pooled = c * height * width
        layers.append((channels, c, out, pooled))
        channels = c
    return layers, channels * height * width


def model_size(settings: Settings, in_shape: tuple[int, ...], n_out: int) -> tuple[int, list[int]]:
    """(parameter count, each layer's output size per example) of the model, as built by
    training/models.py: conv layers with same padding and optional 2x2 pooling, then dense."""
    m = settings.model
    k = m.kernel_size
    convs, width_in = _conv_layers(m, in_shape)
    params = sum((c_in * k * k + 1) * c for c_in, c, _, _ in convs)
    sizes = [out for _, _, out, _ in convs]
    for h in (*m.hidden, n_out):
        params += (width_in + 1) * h
        sizes.append(h)
        width_in = h
    return params, sizes


def network_counts(model: ModelSettings, in_shape: tuple[int, ...], n_out: int) -> tuple[int, int, int]:
    """(parameters, numbers all its modules output per example, multiply-adds per example) of
    the tool's own network (model.kind "mlp" or "cnn") exactly as training/models.py builds
    it: every module's output is counted, the activations, batch norms, pooling, dropout and
    flatten included. No torch, so `recipe run` can size stacked groups of the tool's CNN
    without importing it; tests/test_footprint.py holds the counts equal to the built
    network's and the multiply-adds to torch's FLOP counter."""
    k = model.kernel_size
    convs, width_in = _conv_layers(model, in_shape)
    params = elements = macs = 0
    if model.input_dropout > 0:
        elements += math.prod(in_shape)
    for c_in, c, out, pooled in convs:
        params += (c_in * k * k + 1) * c + 2 * c * model.batch_norm
        macs += out * c_in * k * k
        elements += out * (2 + model.batch_norm) + pooled  # convolution, batch norm, activation, pooling
    elements += width_in  # flatten
    for h in model.hidden:
        params += (width_in + 1) * h + 2 * h * model.batch_norm
        macs += width_in * h
        elements += h * (2 + model.batch_norm + (model.dropout > 0))  # linear, batch norm, activation, dropout
        width_in = h
    return params + (width_in + 1) * n_out, elements + n_out, macs + width_in * n_out


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
