"""Activation functions selectable as ``model.activation``."""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

if TYPE_CHECKING:  # annotations only; torch is imported where it is used
    from torch import nn

__all__ = ["ACTIVATIONS", "gain", "make_activation"]


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
