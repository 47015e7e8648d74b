"""Weight initializers selectable as ``model.init``; biases start at zero.

Each takes the weight tensor, the gain of the layer's activation, the recipe's
``init_scale`` and a torch.Generator built from the job's seed.
Fans follow torch's convention: fan_in = weight.size(1) * receptive field,
fan_out = weight.size(0) * receptive field.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

if TYPE_CHECKING:  # annotations only; torch is imported where it is used
    import torch

from runner.recipe.constraints import Examples

__all__ = ["EXAMPLES", "INITIALIZERS", "USES_GAIN", "fans", "initialize"]


def fans(weight: torch.Tensor) -> tuple[int, int]:
    receptive = weight[0][0].numel() if weight.dim() > 2 else 1
    return weight.size(1) * receptive, weight.size(0) * receptive


def _glorot_uniform(w, gain, scale, g):
    # Glorot & Bengio 2010, normalized initialization: U(-a, a), a = sqrt(6 / (fan_in + fan_out)).
    fan_in, fan_out = fans(w)
    bound = math.sqrt(6.0 / (fan_in + fan_out))
    return w.uniform_(-bound, bound, generator=g)


def _glorot_normal(w, gain, scale, g):
    # Glorot & Bengio 2010: variance 2 / (fan_in + fan_out), normal form.
    fan_in, fan_out = fans(w)
    return w.normal_(0.0, math.sqrt(2.0 / (fan_in + fan_out)), generator=g)


def _he_uniform(w, gain, scale, g):
    # He et al. 2015: variance gain^2 / fan_in; uniform bound sqrt(3) * std.
    fan_in, _ = fans(w)
    bound = math.sqrt(3.0) * gain / math.sqrt(fan_in)
    return w.uniform_(-bound, bound, generator=g)


def _he_normal(w, gain, scale, g):
    # He et al. 2015: N(0, gain^2 / fan_in), gain sqrt(2) for ReLU.
    fan_in, _ = fans(w)
    return w.normal_(0.0, gain / math.sqrt(fan_in), generator=g)


def _lecun_normal(w, gain, scale, g):
    # LeCun et al. 1998 (Efficient BackProp): N(0, 1 / fan_in).
    fan_in, _ = fans(w)
    return w.normal_(0.0, 1.0 / math.sqrt(fan_in), generator=g)


def _orthogonal(w, gain, scale, g):
    # Saxe et al. 2014: a (semi-)orthogonal matrix times the gain; conv kernels are flattened.
    import torch  # here and below on first use: validating a recipe needs only the names

    return torch.nn.init.orthogonal_(w, gain=gain, generator=g)


def _zeros(w, gain, scale, g):
    return w.zero_()


def _normal(w, gain, scale, g):
    return w.normal_(0.0, scale, generator=g)


def _uniform(w, gain, scale, g):
    return w.uniform_(-scale, scale, generator=g)


INITIALIZERS = {
    "glorot_normal": _glorot_normal,
    "glorot_uniform": _glorot_uniform,
    "he_normal": _he_normal,
    "he_uniform": _he_uniform,
    "lecun_normal": _lecun_normal,
    "normal": _normal,
    "orthogonal": _orthogonal,
    "uniform": _uniform,
    "zeros": _zeros,
}

# Worked examples, walked by tests/test_components.py.
EXAMPLES = {
    "glorot_normal": Examples(valid=({"model": {"init": "glorot_normal"}},)),
    "glorot_uniform": Examples(valid=({"model": {"init": "glorot_uniform"}},)),
    "he_normal": Examples(valid=({"model": {"init": "he_normal", "activation": "relu"}},)),
    "he_uniform": Examples(valid=({"model": {"init": "he_uniform", "activation": "leaky_relu"}},)),
    "lecun_normal": Examples(valid=({"model": {"init": "lecun_normal", "activation": "tanh"}},)),
    "normal": Examples(
        valid=({"model": {"init": "normal", "init_scale": 0.05}},),
        invalid=(({"model": {"init": "normal", "init_scale": 0.0}}, "must be > 0"),),
    ),
    "orthogonal": Examples(valid=({"model": {"init": "orthogonal"}},)),
    "uniform": Examples(valid=({"model": {"init": "uniform", "init_scale": 0.1}},)),
    "zeros": Examples(
        valid=({"model": {"init": "zeros"}},),
        invalid=(({"model": {"init": "zero"}}, 'Did you mean "zeros"?'),),
    ),
}

# Methods whose published form scales by the activation's gain; the others ignore it.
USES_GAIN = frozenset({"he_normal", "he_uniform", "orthogonal"})


def initialize(name: str, weight: torch.Tensor, gain: float, scale: float, generator: torch.Generator) -> torch.Tensor:
    """Fill ``weight`` in place. ``scale`` is the std (normal) or bound (uniform)."""
    import torch

    effective_gain = gain if name in USES_GAIN else 1.0
    with torch.no_grad():
        return INITIALIZERS[name](weight, effective_gain, scale, generator)
