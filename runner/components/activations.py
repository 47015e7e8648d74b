"""Activation functions selectable as ``model.activation``."""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

if TYPE_CHECKING:  # annotations only; torch is imported where it is used
    from torch import nn

from runner.recipe.constraints import Examples

__all__ = ["ACTIVATIONS", "EXAMPLES", "gain", "make_activation"]


def _nn():
    from torch import nn  # on first use: validating a recipe needs only the names

    return nn


# name -> factory(leaky_slope) ; kept sorted by name for stable messages.
ACTIVATIONS = {
    "elu": lambda slope: _nn().ELU(),
    "gelu": lambda slope: _nn().GELU(),
    "leaky_relu": lambda slope: _nn().LeakyReLU(slope),
    "relu": lambda slope: _nn().ReLU(),
    "sigmoid": lambda slope: _nn().Sigmoid(),
    "tanh": lambda slope: _nn().Tanh(),
}

# Worked examples, walked by tests/test_components.py.
EXAMPLES = {
    "elu": Examples(valid=({"model": {"activation": "elu"}},)),
    "gelu": Examples(valid=({"model": {"activation": "gelu"}},)),
    "leaky_relu": Examples(
        valid=({"model": {"activation": "leaky_relu", "leaky_slope": 0.1}},),
        invalid=(({"model": {"activation": "leaky_relu", "leaky_slope": 1.0}}, "must be < 1"),),
    ),
    "relu": Examples(
        valid=({"model": {"activation": "relu"}},),
        invalid=(({"model": {"activation": "relu6"}}, "unknown choice"),),
    ),
    "sigmoid": Examples(valid=({"model": {"activation": "sigmoid"}},)),
    "tanh": Examples(valid=({"model": {"activation": "tanh"}},)),
}

# Units counted as "saturated" by the diagnostics: output within this distance of the bound.
SATURATING = {"sigmoid": (0.0, 1.0), "tanh": (-1.0, 1.0)}


def make_activation(name: str, leaky_slope: float = 0.01) -> nn.Module:
    return ACTIVATIONS[name](leaky_slope)


def gain(name: str, leaky_slope: float = 0.01) -> float:
    """Variance-preserving gain for initializers that define one.

    relu: sqrt(2) (He et al. 2015); leaky_relu: sqrt(2 / (1 + a^2)) (He et al. 2015, PReLU);
    elu and gelu: sqrt(2), as for relu (common practice: neither paper derives its own);
    tanh: 5/3 and sigmoid: 1 (the values torch.nn.init.calculate_gain uses; common practice);
    "linear" (the output layer): 1.
    """
    if name in ("relu", "elu", "gelu"):
        return math.sqrt(2.0)
    if name == "leaky_relu":
        return math.sqrt(2.0 / (1.0 + leaky_slope**2))
    if name == "tanh":
        return 5.0 / 3.0
    return 1.0


# The stacked form: forward and derivative kernels over a member axis.


def stacked_activation(name: str, slope: float = 0.01):
    """(forward(z, out), backward(grad, z, a, out), in_place) with autograd's own derivative
    kernels, for the stacked backend's hand-written backward pass; ``in_place``: the backward
    needs only the output, so it may overwrite z. Every activation in ACTIVATIONS has one."""
    import torch

    _aten = torch.ops.aten
    if name == "relu":
        return (
            (lambda z, out: torch.relu_(z)),
            (lambda g, z, a, out: _aten.threshold_backward.grad_input(g, a, 0, grad_input=out)),
            True,
        )
    if name == "tanh":
        return (
            (lambda z, out: torch.tanh_(z)),
            (lambda g, z, a, out: _aten.tanh_backward.grad_input(g, a, grad_input=out)),
            True,
        )
    if name == "sigmoid":
        return (
            (lambda z, out: torch.sigmoid_(z)),
            (lambda g, z, a, out: _aten.sigmoid_backward.grad_input(g, a, grad_input=out)),
            True,
        )
    if name == "leaky_relu":
        return (
            (lambda z, out: _aten.leaky_relu.out(z, slope, out=out)),
            (lambda g, z, a, out: _aten.leaky_relu_backward.grad_input(g, z, slope, False, grad_input=out)),
            False,
        )
    if name == "elu":
        return (
            (lambda z, out: _aten.elu.out(z, 1.0, 1, 1, out=out)),
            (lambda g, z, a, out: _aten.elu_backward.grad_input(g, 1.0, 1, 1, False, z, grad_input=out)),
            False,
        )
    if name == "gelu":
        return (
            (lambda z, out: _aten.gelu.out(z, approximate="none", out=out)),
            (lambda g, z, a, out: _aten.gelu_backward.grad_input(g, z, approximate="none", grad_input=out)),
            False,
        )
    raise ValueError(f"no stacked activation {name}")
