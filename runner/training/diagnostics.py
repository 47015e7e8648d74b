"""Failure-mode diagnostics recorded for every job.

At initialization, on one probe batch (eval mode, so no random draw is consumed): the
input's std, each hidden activation's mean and std, the norm of the loss's gradient with
respect to each hidden activation (the back-propagated signal), and each weighted layer's
weight norm and weight-gradient norm. From them, four ratios across depth:

- ``grad_ratio``: first layer's weight-gradient norm / last layer's;
- ``act_spread``: last hidden activation's std / the input's std;
- ``backprop_spread``: gradient norm at the first hidden activation / at the last;
- ``grad_weight_max``: the largest ||grad W|| / ||W|| over the layers.

A weight gradient is the product of the signal coming forward and the one going back, so
when every layer shrinks alike (too small an init) both shrink and ``grad_ratio`` stays near
1 (Glorot & Bengio 2010 make this point about weight-gradient variances): the two spreads
and the absolute ratio see what it cannot.

At the end: the fraction of dead ReLU units (never positive on the probe batch) and of
saturated sigmoid/tanh units. Flags are decided later from these numbers, with the
thresholds of the recipe's [diagnostics] table.
"""

from __future__ import annotations

import torch
from torch import nn

from runner.components.activations import ACTIVATIONS, SATURATING, make_activation
from runner.training.models import layers_with_weights

__all__ = ["PROBE_ROWS", "activation_kind", "at_end", "at_init", "end_stats", "init_stats", "scales"]

PROBE_ROWS = 512
_ACT_TYPES = tuple({type(make_activation(name)) for name in ACTIVATIONS})


def _activation_modules(net: nn.Module) -> list[nn.Module]:
    return [m for m in net.modules() if isinstance(m, _ACT_TYPES)]


def _capture(net: nn.Module, x: torch.Tensor, grad: bool, loss_fn=None, y=None):
    """One pass on the probe batch in eval mode: each activation module's output with that
    module, in call order (a module called twice gives two); with ``grad``, after a backward
    pass of the loss, the gradient norm at each of those outputs (same order); and the
    weighted layers in the order the forward pass first calls them (a user's network may
    register its layers in another order; layers it never calls are left out)."""
    outputs: list[tuple[nn.Module, torch.Tensor]] = []
    back: dict[int, float] = {}
    called: dict[nn.Module, None] = {}

    def keep(m, _i, out):
        if grad:  # the gradient with respect to this output, as the backward pass meets it
            i = len(outputs)
            out.register_hook(lambda g: back.__setitem__(i, float(g.norm())))
        outputs.append((m, out.detach()))

    hooks = [m.register_forward_hook(keep) for m in _activation_modules(net)]
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
    return outputs, [back.get(i, 0.0) for i in range(len(outputs))], list(called)


def at_init(net: nn.Module, x: torch.Tensor, y: torch.Tensor, loss_fn) -> dict:
    outputs, back, layers = _capture(net, x, grad=True, loss_fn=loss_fn, y=y)
    norms, weight_norms = [], []
    for layer in layers:
        g = layer.weight.grad
        norms.append(float(g.norm()) if g is not None else 0.0)
        weight_norms.append(float(layer.weight.detach().norm()))
    net.zero_grad(set_to_none=True)
    return init_stats(
        [o.reshape(1, -1) for _, o in outputs],
        [norms],
        x.reshape(1, -1),
        backprop=[back],
        weight_norms=[weight_norms],
    )[0]


def _mean_std(o: torch.Tensor) -> tuple[list[float], list[float]]:
    """Per member (row of ``o``): mean and sample std, two passes summed in float64 (torch's
    one-pass std is slow on wide rows)."""
    n = o.shape[1]
    mean = o.sum(dim=1, keepdim=True, dtype=torch.float64) / n
    if n < 2:
        return mean.squeeze(1).tolist(), [0.0] * len(o)
    # deviations from the mean rounded to o's dtype: the variance does not move
    dev = (o - mean.to(o.dtype)).square_()
    return mean.squeeze(1).tolist(), (dev.sum(dim=1, dtype=torch.float64) / (n - 1)).sqrt_().tolist()


def _ratio(top: float, bottom: float) -> float | None:
    if bottom > 0:
        return top / bottom
    # both zero: no signal at all, vanishing at its most extreme; only the bottom: no finite ratio
    return 0.0 if top == 0 else None


def _spreads(stds: list[float], input_std: float | None, back: list[float], grads: list[float], weights: list[float]):
    """The depth ratios of one member (module docstring)."""
    gw = [g / w for g, w in zip(grads, weights) if w > 0]  # an all-zero layer has no scale to compare with
    return {
        "act_spread": _ratio(stds[-1], input_std) if stds and input_std is not None else None,
        "backprop_spread": _ratio(back[0], back[-1]) if len(back) > 1 else None,
        "grad_weight_max": max(gw) if gw else None,
    }


def init_stats(
    outputs: list[torch.Tensor],
    norms: list[list[float]],
    inputs: torch.Tensor | None = None,
    backprop: list[list[float]] | None = None,
    weight_norms: list[list[float]] | None = None,
) -> list[dict]:
    """Per member: ``outputs`` are each hidden activation's values, (members, values);
    ``norms`` each member's weight-gradient norms, input layer first; ``inputs`` the probe
    inputs (members, values); ``backprop`` each member's gradient norms at the hidden
    activations, first hidden layer first; ``weight_norms`` its weight norms, as ``norms``.
    The last three are optional (a backend that does not measure them records None)."""
    means, stds = [], []
    for o in outputs:
        m, s = _mean_std(o)
        means.append(m)
        stds.append(s)
    input_stds = _mean_std(inputs)[1] if inputs is not None else [None] * len(norms)
    stats = []
    for k, member_norms in enumerate(norms):
        ratio = None
        if len(member_norms) > 1:
            if member_norms[-1] > 0:
                ratio = member_norms[0] / member_norms[-1]
            elif not any(member_norms):
                ratio = 0.0  # no gradient reaches any layer: vanishing at its most extreme
        back = list(backprop[k]) if backprop is not None else []
        weights = list(weight_norms[k]) if weight_norms is not None else []
        member_stds = [s[k] for s in stds]
        stats.append(
            {
                "init_act_mean": [m[k] for m in means],
                "init_act_std": member_stds,
                "init_grad_norms": list(member_norms),
                "grad_ratio": ratio,
                "init_input_std": input_stds[k],
                "init_backprop_norms": back if backprop is not None else None,
                "init_weight_norms": weights if weight_norms is not None else None,
                **_spreads(member_stds, input_stds[k], back, list(member_norms), weights),
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
    outputs, _, _ = _capture(net, x, grad=False)
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


def scales(sp, classes: int | None) -> dict:
    """The scales a job's flags are measured against (training/summaries.py): the val
    split's rows; the classes (classification) or the target's std on the training split
    (regression, the divisor its standardization used)."""
    out: dict = {"val_rows": len(sp.y_val)}
    if classes is None:
        out["target_std"] = float(sp.y_std)
    else:
        out["classes"] = classes
    return out
