"""Optimizer steps for K stacked models at once, each member with its own hyperparameters.

Tensors have a leading member axis; hyperparameters are (K,) tensors broadcast over the
rest. The update rules are torch.optim's (tests compare them step by step):
- sgd:      p -= lr * (g + wd p)
- momentum: b = mu b + g' (b = g' on the first step), p -= lr b        [g' = g + wd p]
- nesterov: b as momentum, p -= lr (g' + mu b)                         (Sutskever et al. 2013)
- adam:     m, v moving averages of g', bias-corrected (Kingma & Ba 2015, Algorithm 1)
- adamw:    p *= 1 - lr wd, then adam on g (Loshchilov & Hutter 2019)
Weight decay acts only where ``decays`` says: True/False per tensor, or a 0/1 mask over a
flat parameter buffer (weights 1, biases 0).
"""
from __future__ import annotations

import torch

__all__ = ["STACKED_OPTIMIZERS", "StackedOptimizer"]

STACKED_OPTIMIZERS = ("adam", "adamw", "momentum", "nesterov", "sgd")


def _b(x: torch.Tensor, like: torch.Tensor) -> torch.Tensor:
    """Broadcast a (K,) tensor over a (K, ...) tensor."""
    return x.view(-1, *([1] * (like.dim() - 1)))


class StackedOptimizer:
    def __init__(self, kind: str, params: list[torch.Tensor], decays: list, hyper: dict[str, torch.Tensor]):
        if kind not in STACKED_OPTIMIZERS:
            raise ValueError(f"no stacked step for {kind}")
        self.kind = kind
        self.params = params
        self.decays = decays
        self.h = hyper  # lr is set per step; momentum, beta1, beta2, eps, weight_decay: (K,)
        self.t = 0
        self.state = [{} for _ in params]

    @torch.no_grad()
    def step(self, lr: torch.Tensor, active: torch.Tensor) -> None:
        """One step; members with ``active`` False do not move."""
        self.t += 1
        lr = torch.where(active, lr, torch.zeros_like(lr))
        if self.kind in ("adam", "adamw"):
            self._c1 = 1 - self.h["beta1"] ** self.t  # bias corrections, once per step
            self._c2 = 1 - self.h["beta2"] ** self.t
        for p, decay, st in zip(self.params, self.decays, self.state):
            g = p.grad
            if g is None:
                continue
            if isinstance(decay, torch.Tensor):
                wd = _b(self.h["weight_decay"], p) * decay
            else:
                wd = _b(self.h["weight_decay"], p) if decay else None
            LR = _b(lr, p)
            if self.kind == "adamw":
                if wd is not None:
                    p.mul_(1 - LR * wd)
                self._adam(p, g, st, LR)
                continue
            if wd is not None:
                g = g + wd * p
            if self.kind == "sgd":
                p.sub_(LR * g)
            elif self.kind in ("momentum", "nesterov"):
                mu = _b(self.h["momentum"], p)
                if "buf" not in st:
                    st["buf"] = g.clone()
                else:
                    st["buf"].mul_(mu).add_(g)
                d = g + mu * st["buf"] if self.kind == "nesterov" else st["buf"]
                p.sub_(LR * d)
            else:
                self._adam(p, g, st, LR)

    def _adam(self, p, g, st, LR) -> None:
        if "m" not in st:
            st["m"] = torch.zeros_like(p)
            st["v"] = torch.zeros_like(p)
        st["m"].lerp_(g, _b(1 - self.h["beta1"], p))         # b1 m + (1 - b1) g
        st["v"].lerp_(g * g, _b(1 - self.h["beta2"], p))     # b2 v + (1 - b2) g^2
        denom = st["v"].div(_b(self._c2, p)).sqrt_().add_(_b(self.h["eps"], p))
        p.sub_(st["m"].div(denom).mul_(LR / _b(self._c1, p)))
