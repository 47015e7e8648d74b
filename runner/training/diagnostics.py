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

from runner.components.activations import ACTIVATIONS, SATURATING, make_activation
from runner.training.models import layers_with_weights

__all__ = ["PROBE_ROWS", "activation_kind", "at_end", "at_init", "end_stats", "init_stats"]

PROBE_ROWS = 512
_ACT_TYPES = tuple({type(make_activation(name)) for name in ACTIVATIONS})


def _activation_modules(net: nn.Module) -> list[nn.Module]:
    return [m for m in net.modules() if isinstance(m, _ACT_TYPES)]


def _capture(net: nn.Module, x: torch.Tensor, grad: bool, loss_fn=None, y=None):
    """One pass on the probe batch in eval mode: each activation module's output with that
    module, in call order (a module called twice gives two), and the weighted layers in the
    order the forward pass first calls them (a user's network may register its layers in
    another order; layers it never calls are left out)."""
    outputs: list[tuple[nn.Module, torch.Tensor]] = []
    called: dict[nn.Module, None] = {}
    hooks = [
        m.register_forward_hook(lambda m, _i, out: outputs.append((m, out.detach()))) for m in _activation_modules(net)
    ]
    hooks += [m.register_forward_hook(lambda m, _i, _o: called.setdefault(m)) for m in layers_with_weights(net)]
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
    return outputs, list(called)


def at_init(net: nn.Module, x: torch.Tensor, y: torch.Tensor, loss_fn) -> dict:
    outputs, layers = _capture(net, x, grad=True, loss_fn=loss_fn, y=y)
    norms = []
    for layer in layers:
        g = layer.weight.grad
        norms.append(float(g.norm()) if g is not None else 0.0)
    net.zero_grad(set_to_none=True)
    return init_stats([o.reshape(1, -1) for _, o in outputs], [norms])[0]


def init_stats(outputs: list[torch.Tensor], norms: list[list[float]]) -> list[dict]:
    """Per member: ``outputs`` are each hidden activation's values, (members, values);
    ``norms`` each member's weight-gradient norms, input layer first."""
    means, stds = [], []
    for o in outputs:  # two passes, summed in float64 (torch's one-pass std is slow on wide rows)
        n = o.shape[1]
        mean = o.sum(dim=1, keepdim=True, dtype=torch.float64) / n
        means.append(mean.squeeze(1).tolist())
        if n > 1:  # deviations from the mean rounded to o's dtype: the variance does not move
            dev = (o - mean.to(o.dtype)).square_()
            stds.append((dev.sum(dim=1, dtype=torch.float64) / (n - 1)).sqrt_().tolist())
        else:
            stds.append([0.0] * len(o))
    stats = []
    for k, member_norms in enumerate(norms):
        ratio = None
        if len(member_norms) > 1:
            if member_norms[-1] > 0:
                ratio = member_norms[0] / member_norms[-1]
            elif not any(member_norms):
                ratio = 0.0  # no gradient reaches any layer: vanishing at its most extreme
        stats.append(
            {
                "init_act_mean": [m[k] for m in means],
                "init_act_std": [s[k] for s in stds],
                "init_grad_norms": list(member_norms),
                "grad_ratio": ratio,
            }
        )
    return stats


_KINDS = {type(make_activation(name)): name for name in ACTIVATIONS}


def activation_kind(module: nn.Module) -> str | None:
    """The tool's name of an activation module ("relu", "tanh", ...), or None."""
    return next((name for cls, name in _KINDS.items() if isinstance(module, cls)), None)


def at_end(net: nn.Module, x: torch.Tensor, activation: str | None) -> dict:
    """Dead and saturated fractions on the probe batch. ``activation``: the kind of every
    activation module (the tool's networks), or None to take each module's own kind (a
    user's network may mix them: dead units are then counted among its ReLU outputs,
    saturated ones among its sigmoid and tanh outputs)."""
    outputs, _ = _capture(net, x, grad=False)
    # one unit per feature (dense) or channel (conv): (1, rows x positions, units)
    units = [(m, (o.movedim(1, -1) if o.dim() > 2 else o).reshape(1, -1, o.shape[1])) for m, o in outputs]
    if activation is not None:
        return end_stats([u for _, u in units], activation, 1)[0]
    by_kind: dict[str, list[torch.Tensor]] = {}
    for m, u in units:
        by_kind.setdefault(activation_kind(m), []).append(u)
    dead = end_stats(by_kind["relu"], "relu", 1)[0]["dead_fraction"] if "relu" in by_kind else None
    saturated, total = 0.0, 0
    for kind in SATURATING:
        if kind in by_kind:
            n = sum(u.shape[2] for u in by_kind[kind])
            saturated += end_stats(by_kind[kind], kind, 1)[0]["saturated_fraction"] * n
            total += n
    return {"dead_fraction": dead, "saturated_fraction": saturated / total if total else None}


def end_stats(outputs: list[torch.Tensor], activation: str, members: int) -> list[dict]:
    """Per member: dead and saturated fractions of the hidden units, from each hidden
    activation's values laid out (members, rows, units)."""
    if not outputs:
        return [{"dead_fraction": None, "saturated_fraction": None} for _ in range(members)]
    total = sum(o.shape[2] for o in outputs)
    dead = saturated = [None] * members
    if activation == "relu":  # never positive on any probe row
        dead = (sum((o.amax(dim=1) <= 0).sum(dim=1) for o in outputs).double() / total).tolist()
    bounds = SATURATING.get(activation)
    if bounds is not None:
        lo, hi = bounds
        margin = 0.01 * (hi - lo)  # within 1% of the output range of a bound
        count = sum(
            ((((o - lo) < margin) | ((hi - o) < margin)).float().mean(dim=1) >= 0.9).sum(dim=1) for o in outputs
        )  # saturated on >= 90% of rows
        saturated = (count.double() / total).tolist()
    return [{"dead_fraction": d, "saturated_fraction": s} for d, s in zip(dead, saturated)]
