"""Failure-mode diagnostics recorded for every job.

At initialization, on one probe batch (eval mode, so no random draw is consumed): each hidden
activation's mean and std, and each weighted layer's weight-gradient norm. The ratio of the
first layer's gradient norm to the last layer's tells vanishing (tiny) or exploding (huge)
gradients. At the end: the fraction of dead ReLU units (never positive on the probe batch)
and of saturated sigmoid/tanh units. Flags are decided later from these numbers, with the
thresholds of the recipe's [diagnostics] table.
"""
from __future__ import annotations

import torch
from torch import nn

from .activations import ACTIVATIONS, SATURATING, make_activation
from .models import layers_with_weights

__all__ = ["at_init", "at_end", "PROBE_ROWS"]

PROBE_ROWS = 512
_ACT_TYPES = tuple({type(make_activation(name)) for name in ACTIVATIONS})


def _activation_modules(net: nn.Module) -> list[nn.Module]:
    return [m for m in net.modules() if isinstance(m, _ACT_TYPES)]


def _capture(net: nn.Module, x: torch.Tensor, grad: bool, loss_fn=None, y=None):
    outputs = []
    hooks = [m.register_forward_hook(lambda _m, _i, out: outputs.append(out.detach()))
             for m in _activation_modules(net)]
    was_training = net.training
    net.eval()
    try:
        if grad:
            loss = loss_fn(net(x), y)
            loss.backward()
        else:
            with torch.no_grad():
                net(x)
    finally:
        for h in hooks:
            h.remove()
        net.train(was_training)
    return outputs


def at_init(net: nn.Module, x: torch.Tensor, y: torch.Tensor, loss_fn) -> dict:
    outputs = _capture(net, x, grad=True, loss_fn=loss_fn, y=y)
    norms = []
    for layer in layers_with_weights(net):
        g = layer.weight.grad
        norms.append(float(g.norm()) if g is not None else 0.0)
    net.zero_grad(set_to_none=True)
    ratio = None
    if len(norms) > 1:
        if norms[-1] > 0:
            ratio = norms[0] / norms[-1]
        elif not any(norms):
            ratio = 0.0  # no gradient reaches any layer: vanishing at its most extreme
    return {
        "init_act_mean": [float(o.mean()) for o in outputs],
        "init_act_std": [float(o.std()) if o.numel() > 1 else 0.0 for o in outputs],
        "init_grad_norms": norms,
        "grad_ratio": ratio,
    }


def at_end(net: nn.Module, x: torch.Tensor, activation: str) -> dict:
    outputs = _capture(net, x, grad=False)
    if not outputs:
        return {"dead_fraction": None, "saturated_fraction": None}
    units = [o.transpose(0, 1).reshape(o.shape[1], -1) for o in outputs]  # (units, rows)
    dead = saturated = None
    if activation == "relu":
        total = sum(u.shape[0] for u in units)
        dead = sum(int((u.max(dim=1).values <= 0).sum()) for u in units) / total
    bounds = SATURATING.get(activation)
    if bounds is not None:
        lo, hi = bounds
        margin = 0.01 * (hi - lo)  # within 1% of the output range of a bound
        total = sum(u.shape[0] for u in units)
        count = 0
        for u in units:
            near = ((u - lo) < margin) | ((hi - u) < margin)
            count += int((near.float().mean(dim=1) >= 0.9).sum())  # saturated on >= 90% of rows
        saturated = count / total
    return {"dead_fraction": dead, "saturated_fraction": saturated}
