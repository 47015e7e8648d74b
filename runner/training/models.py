"""Models: an MLP and a small CNN, built with every random draw from a given generator."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import torch
from torch import nn

from runner.components.activations import gain, make_activation
from runner.components.initializers import initialize

__all__ = ["WEIGHTED", "Dropout", "build_model", "layers_with_weights", "weight_tensors"]


class Dropout(nn.Module):
    """Inverted dropout (Srivastava et al. 2014): kept units scaled by 1/(1-p) in training,
    identity in eval mode. Masks come from the job's own generator, not the global one."""

    def __init__(self, p: float, generator: torch.Generator):
        super().__init__()
        self.p = p
        self.generator = generator

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        if not self.training or self.p == 0:
            return x
        keep = torch.empty_like(x).bernoulli_(1.0 - self.p, generator=self.generator)
        return x * keep / (1.0 - self.p)

    def extra_repr(self) -> str:
        return f"p={self.p}"


def build_model(
    model: Mapping[str, Any],
    in_shape: tuple[int, ...],
    n_out: int,
    init_gen: torch.Generator,
    dropout_gen: torch.Generator,
    module=None,
) -> nn.Module:
    """The job's network; ``module``: the source of the user's own (model.kind = "python")."""
    if model.kind == "python":
        from runner.training.user_module import build_user_model

        return build_user_model(module, model, in_shape, n_out, init_gen, dropout_gen)
    act = model.activation
    slope = model.leaky_slope
    layers: list[nn.Module] = []
    if model.input_dropout > 0:
        layers.append(Dropout(model.input_dropout, dropout_gen))
    if model.kind == "cnn":
        channels, height, width = in_shape
        k = model.kernel_size
        for c in model.channels:
            layers.append(nn.Conv2d(channels, c, k, padding=k // 2))
            height, width = height + 2 * (k // 2) - k + 1, width + 2 * (k // 2) - k + 1
            if model.batch_norm:
                layers.append(nn.BatchNorm2d(c))
            layers.append(make_activation(act, slope))
            if model.pool != "none" and min(height, width) >= 2:
                layers.append(nn.MaxPool2d(2) if model.pool == "max" else nn.AvgPool2d(2))
                height, width = height // 2, width // 2
            channels = c
        layers.append(nn.Flatten())
        width_in = channels * height * width
    else:
        layers.append(nn.Flatten())
        width_in = int(torch.tensor(in_shape).prod())
    for h in model.hidden:
        layers.append(nn.Linear(width_in, h))
        if model.batch_norm:
            layers.append(nn.BatchNorm1d(h))
        layers.append(make_activation(act, slope))
        if model.dropout > 0:
            layers.append(Dropout(model.dropout, dropout_gen))
        width_in = h
    layers.append(nn.Linear(width_in, n_out))
    net = nn.Sequential(*layers)
    weighted = layers_with_weights(net)
    for i, layer in enumerate(weighted):
        layer_gain = 1.0 if i == len(weighted) - 1 else gain(act, slope)  # output layer is linear
        initialize(model.init, layer.weight, layer_gain, model.init_scale, init_gen)
        with torch.no_grad():
            layer.bias.zero_()
    return net


WEIGHTED = (nn.Linear, nn.Conv1d, nn.Conv2d, nn.Conv3d)  # layers whose weight the tool initializes and penalizes


def layers_with_weights(net: nn.Module) -> list[nn.Module]:
    """Dense and conv layers in the network's registration order (nn.Module.modules)."""
    return [m for m in net.modules() if isinstance(m, WEIGHTED)]


def weight_tensors(net: nn.Module) -> list[torch.Tensor]:
    """The tensors penalties and sparsity act on: weights of dense and conv layers only."""
    return [m.weight for m in layers_with_weights(net)]
