"""Optimizer steps for K stacked models at once, each member with its own kind and
hyperparameters.

Parameters are tensors with a leading member axis (K, ...); hyperparameters are (K,)
tensors. The update rules are torch.optim's (tests compare them step by step):
- sgd:      p -= lr * (g + wd p)
- momentum: b = mu b + g' (b = g' on the first step), p -= lr b        [g' = g + wd p]
- nesterov: b as momentum, p -= lr (g' + mu b)                         (Sutskever et al. 2013)
- adam:     m, v moving averages of g', bias-corrected (Kingma & Ba 2015, Algorithm 1)
- adamw:    p *= 1 - lr wd, then adam on g (Loshchilov & Hutter 2019)
Weight decay acts only where ``decays`` says, per tensor: True, False, or a 0/1 mask over
the tensor's trailing axes (weights 1, biases 0 in a stacked network's (K, P) buffer).

Members of one kind with the same settings step together, on contiguous runs of members
(slices, not copies): the sgd family with a per-member learning-rate column, the adam family
through torch's fused Adam kernel (the one torch.optim.Adam(fused=True) runs), one call per
distinct (lr, betas, eps). Inactive members are left out, so they do not move at all.
"""

from __future__ import annotations

from collections.abc import Sequence
from itertools import groupby

import torch

__all__ = ["STACKED_OPTIMIZERS", "StackedOptimizer", "member_runs"]

STACKED_OPTIMIZERS = ("adam", "adamw", "momentum", "nesterov", "sgd")
_ADAM = ("adam", "adamw")


def _column(values: Sequence[float], like: torch.Tensor) -> torch.Tensor:
    """(len(values), 1, ...) to broadcast per member over ``like``'s trailing axes."""
    return torch.tensor(values, dtype=like.dtype).view(-1, *([1] * (like.dim() - 1)))


def member_runs(rows: list[int]) -> list[slice]:
    """Contiguous runs of sorted member indices, as slices."""
    out = []
    for _, grp in groupby(enumerate(rows), key=lambda t: t[1] - t[0]):
        members = [k for _, k in grp]
        out.append(slice(members[0], members[-1] + 1))
    return out


class StackedOptimizer:
    fused = hasattr(torch, "_fused_adam_")  # torch's fused Adam kernel; else the written-out rule

    def __init__(
        self,
        kinds: str | Sequence[str],
        params: list[torch.Tensor],
        grads: list[torch.Tensor],
        decays: list[bool],
        hyper: dict[str, torch.Tensor],
    ):
        K = params[0].shape[0]
        self.kinds = [kinds] * K if isinstance(kinds, str) else list(kinds)
        unknown = set(self.kinds) - set(STACKED_OPTIMIZERS)
        if unknown:
            raise ValueError(f"no stacked step for {sorted(unknown)}")
        self.params, self.grads, self.decays = params, grads, decays
        h = {
            name: hyper[name].tolist() if name in hyper else [0.0] * K
            for name in ("momentum", "beta1", "beta2", "eps", "weight_decay")
        }
        self.h = h
        wd = h["weight_decay"]
        adamw = [kind == "adamw" for kind in self.kinds]
        self.coupled = [0.0 if a else w for a, w in zip(adamw, wd)]  # added to the gradient
        self.decoupled = [w if a else 0.0 for a, w in zip(adamw, wd)]  # shrinks the weights
        self.t = 0
        self.step_count = torch.zeros((), dtype=torch.float32)
        self.moments = None  # (m, v) per tensor, for the adam family
        self.buffers = None  # momentum buffer per tensor
        if any(k in _ADAM for k in self.kinds):
            self.moments = ([torch.zeros_like(p) for p in params], [torch.zeros_like(p) for p in params])
        if any(k in ("momentum", "nesterov") for k in self.kinds):
            self.buffers = [torch.zeros_like(p) for p in params]
        self._coupled = (
            [self._decay_coef(self.coupled, p, d) for p, d in zip(params, decays)] if any(self.coupled) else None
        )
        self._mu_cols = [_column(h["momentum"], p) for p in params]

    @staticmethod
    def _decay_coef(values, p: torch.Tensor, decay) -> torch.Tensor | None:
        """Per-member ``values`` as a coefficient over p, zero where p does not decay."""
        if isinstance(decay, torch.Tensor):
            return _column(values, p) * decay
        return _column(values, p) if decay else None

    @torch.no_grad()
    def step(self, lr: Sequence[float] | torch.Tensor, active: Sequence[bool] | torch.Tensor) -> None:
        """One step with each member's learning rate; members with ``active`` False do not move."""
        self.t += 1
        self.step_count.fill_(self.t)
        lr = lr.tolist() if isinstance(lr, torch.Tensor) else list(lr)
        active = active.tolist() if isinstance(active, torch.Tensor) else list(active)
        if self._coupled is not None:
            for p, g, coef in zip(self.params, self.grads, self._coupled):
                if coef is not None:
                    g.addcmul_(p, coef)
        if any(w and a for w, a in zip(self.decoupled, active)):
            amount = [r * w if a else 0.0 for r, w, a in zip(lr, self.decoupled, active)]
            for p, decay in zip(self.params, self.decays):
                coef = self._decay_coef(amount, p, decay)
                if coef is not None:
                    p.mul_(1.0 - coef)
        for action in self._plan(lr, active):
            action()

    def _plan(self, lr: list[float], active: list[bool]) -> list:
        """The step's updates as closures over slices, remade only when the learning rates
        or the active members change (with a constant rate: once)."""
        key = (tuple(lr), tuple(active))
        if getattr(self, "_plan_key", None) == key:
            return self._plan_actions
        neg_lr = torch.tensor([-r for r in lr], dtype=self.params[0].dtype)
        classes: dict[tuple, list[int]] = {}
        for k, kind in enumerate(self.kinds):
            if not active[k]:
                continue
            ckey = (kind, lr[k], self.h["beta1"][k], self.h["beta2"][k], self.h["eps"][k]) if kind in _ADAM else (kind,)
            classes.setdefault(ckey, []).append(k)
        actions = []
        for ckey, rows in classes.items():
            for run in member_runs(rows):
                actions.append(
                    self._adam_action(run, *ckey[1:]) if ckey[0] in _ADAM else self._sgd_action(ckey[0], run, neg_lr)
                )
        self._plan_key, self._plan_actions = key, actions
        return actions

    def _sgd_action(self, kind: str, run: slice, neg_lr_all: torch.Tensor):
        parts = []
        for i, (p, g) in enumerate(zip(self.params, self.grads)):
            neg_lr = neg_lr_all[run].view(-1, *([1] * (p.dim() - 1)))
            if kind == "sgd":
                parts.append((p[run], g[run], None, None, neg_lr))
            else:
                parts.append((p[run], g[run], self.buffers[i][run], self._mu_cols[i][run], neg_lr))

        def step():
            for p, g, buf, mu, neg_lr in parts:
                if buf is None:
                    p.addcmul_(g, neg_lr)
                    continue
                buf.mul_(mu).add_(g)  # zeros on the first step, so b = g' as torch.optim
                p.addcmul_(g.add_(buf * mu) if kind == "nesterov" else buf, neg_lr)

        return step

    def _adam_action(self, run: slice, lr: float, beta1: float, beta2: float, eps: float):
        ps = [p[run] for p in self.params]
        gs = [g[run] for g in self.grads]
        ms = [m[run] for m in self.moments[0]]
        vs = [v[run] for v in self.moments[1]]
        steps = [self.step_count] * len(ps)
        if self.fused and ps[0].dtype in (torch.float32, torch.float64):
            return lambda: torch._fused_adam_(
                ps,
                gs,
                ms,
                vs,
                [],
                steps,
                lr=lr,
                beta1=beta1,
                beta2=beta2,
                weight_decay=0.0,
                eps=eps,
                amsgrad=False,
                maximize=False,
            )

        def step():  # Kingma & Ba 2015, Algorithm 1
            c1, c2 = 1 - beta1**self.t, 1 - beta2**self.t
            for p, g, m, v in zip(ps, gs, ms, vs):
                m.lerp_(g, 1 - beta1)
                v.mul_(beta2).addcmul_(g, g, value=1 - beta2)
                p.addcdiv_(m, (v / c2).sqrt_().add_(eps), value=-lr / c1)

        return step
