"""Optimizers selectable as ``train.optimizer``, with their hyperparameter table.

All are torch.optim classes configured as published:
- sgd: w <- w - lr * g.
- momentum: heavy ball (Polyak 1964). torch keeps b <- mu*b + g, w <- w - lr*b; the textbook
  form v <- mu*v - lr*g, w <- w + v is the same trajectory with v = -lr*b while lr is constant.
- nesterov: Sutskever et al. 2013 look-ahead momentum. torch stores the look-ahead point
  w + mu*v rather than w itself (a reparametrization), so its parameter trajectory equals
  the look-ahead sequence of the textbook form for a constant lr.
- adam: Kingma & Ba 2015, Algorithm 1 (eps added to sqrt(v_hat)).
- adamw: Loshchilov & Hutter 2019, decoupled weight decay.
- rmsprop (Tieleman & Hinton 2012, from memory), adagrad (Duchi et al. 2011).

``weight_decay`` is torch's: added to the gradient (coupled) for every optimizer but adamw,
where it shrinks the weights directly (decoupled). It applies to weight matrices only, never to
biases or batch-norm parameters.

The stacked form (``StackedOptimizer``, below the torch form; the stacked backend's):
optimizer steps for K stacked models at once, each member with its own kind and
hyperparameters. Parameters are tensors with a leading member axis (K, ...); hyperparameters are (K,)
tensors. The update rules are torch.optim's (tests compare them step by step):
- sgd:      p -= lr * (g + wd p)
- momentum: b = mu b + g' (b = g' on the first step), p -= lr b        [g' = g + wd p]
- nesterov: b as momentum, p -= lr (g' + mu b)                         (Sutskever et al. 2013)
- adam:     m, v moving averages of g', bias-corrected (Kingma & Ba 2015, Algorithm 1)
- adamw:    p *= 1 - lr wd, then adam on g (Loshchilov & Hutter 2019)
- rmsprop:  s = alpha s + (1 - alpha) g'^2, p -= lr g' / (sqrt(s) + eps)   (torch's, not centered)
- adagrad:  s += g'^2, p -= lr g' / (sqrt(s) + eps)                       (Duchi et al. 2011)
Weight decay acts only where ``decays`` says, per tensor: True, False, or a 0/1 mask over
the tensor's trailing axes (weights 1, biases 0 in a stacked network's (K, P) buffer).

Members of one kind with the same settings step together, on contiguous runs of members
(slices, not copies): the sgd family with a per-member learning-rate column, the adam family
through torch's fused Adam kernel (the one torch.optim.Adam(fused=True) runs), one call per
distinct (lr, betas, eps), rmsprop and adagrad one run per distinct (lr, alpha, eps).
Inactive members are left out, so they do not move at all. A member's step does not depend
on which members share its run (see stacked_network.aligned).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from itertools import groupby
from typing import TYPE_CHECKING

from runner.errors import RecipeError
from runner.recipe.constraints import Examples, Param, Real

if TYPE_CHECKING:
    # annotations only; torch is imported where it is used
    import torch

    from runner.recipe.settings import TrainSettings

__all__ = [
    "EXAMPLES",
    "HYPERPARAMS",
    "OPTIMIZERS",
    "STACKED_OPTIMIZERS",
    "StackedOptimizer",
    "build_optimizer",
    "check_optimizer",
    "member_column",
    "member_runs",
]

HYPERPARAMS = {
    "lr": Param(Real(0, None, low_open=True), 1e-3, "learning rate (the peak value under a schedule)"),
    "momentum": Param(Real(0, 1, high_open=True), 0.9, "momentum coefficient mu for momentum and nesterov"),
    "beta1": Param(Real(0, 1, high_open=True), 0.9, "Adam/AdamW first-moment decay"),
    "beta2": Param(Real(0, 1, high_open=True), 0.999, "Adam/AdamW second-moment decay"),
    "alpha": Param(Real(0, 1, high_open=True), 0.99, "RMSprop squared-gradient smoothing"),
    "eps": Param(Real(0, None, low_open=True), 1e-8, "denominator term for adam, adamw, rmsprop, adagrad"),
    "weight_decay": Param(Real(0, None), 0.0, "torch weight decay: coupled, except decoupled for adamw"),
}


@dataclass(frozen=True, slots=True)
class OptimizerSpec:
    uses: tuple[str, ...]
    build: Callable[[list, dict], torch.optim.Optimizer]


def _optim():
    import torch.optim  # on first use: validating a recipe needs only the tables above

    return torch.optim


def _sgd(groups, t):
    return _optim().SGD(groups, lr=t.lr, momentum=0.0)


def _momentum(groups, t):
    return _optim().SGD(groups, lr=t.lr, momentum=t.momentum)


def _nesterov(groups, t):
    return _optim().SGD(groups, lr=t.lr, momentum=t.momentum, nesterov=True)


def _adam(groups, t):
    return _optim().Adam(groups, lr=t.lr, betas=(t.beta1, t.beta2), eps=t.eps)


def _adamw(groups, t):
    return _optim().AdamW(groups, lr=t.lr, betas=(t.beta1, t.beta2), eps=t.eps)


def _rmsprop(groups, t):
    return _optim().RMSprop(groups, lr=t.lr, alpha=t.alpha, eps=t.eps)


def _adagrad(groups, t):
    return _optim().Adagrad(groups, lr=t.lr, eps=t.eps)


OPTIMIZERS = {
    "adagrad": OptimizerSpec(("lr", "eps", "weight_decay"), _adagrad),
    "adam": OptimizerSpec(("lr", "beta1", "beta2", "eps", "weight_decay"), _adam),
    "adamw": OptimizerSpec(("lr", "beta1", "beta2", "eps", "weight_decay"), _adamw),
    "momentum": OptimizerSpec(("lr", "momentum", "weight_decay"), _momentum),
    "nesterov": OptimizerSpec(("lr", "momentum", "weight_decay"), _nesterov),
    "rmsprop": OptimizerSpec(("lr", "alpha", "eps", "weight_decay"), _rmsprop),
    "sgd": OptimizerSpec(("lr", "weight_decay"), _sgd),
}

# Worked examples, walked by tests/test_components.py.
EXAMPLES = {
    "adagrad": Examples(valid=({"train": {"optimizer": "adagrad", "lr": 0.05}},)),
    "adam": Examples(
        valid=({"train": {"optimizer": "adam", "lr": 0.003, "beta1": 0.8, "beta2": 0.99}},),
        invalid=(({"train": {"optimizer": "adam", "beta2": 1.0}}, "must be < 1"),),
    ),
    "adamw": Examples(valid=({"train": {"optimizer": "adamw", "lr": 0.003, "weight_decay": 0.01}},)),
    "momentum": Examples(
        valid=({"train": {"optimizer": "momentum", "lr": 0.05, "momentum": 0.9}},),
        invalid=(({"train": {"optimizer": "momentum", "momentum": 0.0}}, "momentum needs momentum > 0"),),
    ),
    "nesterov": Examples(
        valid=({"train": {"optimizer": "nesterov", "lr": 0.05, "momentum": 0.5}},),
        invalid=(({"train": {"optimizer": "nesterov", "momentum": 0.0}}, "nesterov needs momentum > 0"),),
    ),
    "rmsprop": Examples(valid=({"train": {"optimizer": "rmsprop", "lr": 0.003, "alpha": 0.9}},)),
    "sgd": Examples(
        valid=({"train": {"optimizer": "sgd", "lr": 0.1, "weight_decay": 1e-4}},),
        invalid=(({"train": {"optimizer": "sgd", "lr": -0.1}}, "must be > 0"),),
    ),
}


def check_optimizer(train: TrainSettings) -> None:
    """Rules that span two settings."""
    if train.optimizer in ("momentum", "nesterov") and train.momentum <= 0:
        raise RecipeError(
            f"{train.optimizer} needs momentum > 0",
            key="train.momentum",
            value=train.momentum,
            allowed="a number in (0, 1)",
            hint='Use optimizer = "sgd" for plain gradient descent',
        )


def build_optimizer(model: torch.nn.Module, train: TrainSettings) -> torch.optim.Optimizer:
    """Weight matrices get ``weight_decay``; biases and normalization parameters get none."""
    decay, no_decay = split_parameters(model)
    groups = [{"params": decay, "weight_decay": train.weight_decay}, {"params": no_decay, "weight_decay": 0.0}]
    groups = [g for g in groups if g["params"]]
    return OPTIMIZERS[train.optimizer].build(groups, train)


def split_parameters(model: torch.nn.Module) -> tuple[list, list]:
    """(weights of linear/conv layers, everything else: biases and normalization)."""
    import torch

    nn = torch.nn
    weighted = (nn.Linear, nn.Conv1d, nn.Conv2d, nn.Conv3d)  # as training.models.WEIGHTED
    decay, no_decay = [], []
    for module in model.modules():
        for name, param in module.named_parameters(recurse=False):
            is_weight = name == "weight" and isinstance(module, weighted)
            (decay if is_weight else no_decay).append(param)
    return decay, no_decay


# The stacked form: every optimizer in STACKED_OPTIMIZERS, over K members at once.

STACKED_OPTIMIZERS = ("adagrad", "adam", "adamw", "momentum", "nesterov", "rmsprop", "sgd")
_ADAM = ("adam", "adamw")
_SQUARES = ("adagrad", "rmsprop")  # a running sum or average of squared gradients per weight


def member_column(values: Sequence[float], like: torch.Tensor) -> torch.Tensor:
    """(len(values), 1, ...) to broadcast per member over ``like``'s trailing axes."""
    import torch

    return torch.tensor(values, dtype=like.dtype).view(-1, *([1] * (like.dim() - 1)))


def member_runs(rows: list[int]) -> list[slice]:
    """Contiguous runs of sorted member indices, as slices."""
    out = []
    for _, grp in groupby(enumerate(rows), key=lambda t: t[1] - t[0]):
        members = [k for _, k in grp]
        out.append(slice(members[0], members[-1] + 1))
    return out


class StackedOptimizer:
    """K members' optimizer steps at once (the stacked form of every optimizer above that
    is in STACKED_OPTIMIZERS)."""

    def __init__(
        self,
        kinds: str | Sequence[str],
        params: list[torch.Tensor],
        grads: list[torch.Tensor],
        decays: list[bool],
        hyper: dict[str, torch.Tensor],
    ):
        import torch

        self.fused = hasattr(torch, "_fused_adam_")  # torch's fused Adam kernel; else the written-out rule
        K = params[0].shape[0]
        self.kinds = [kinds] * K if isinstance(kinds, str) else list(kinds)
        unknown = set(self.kinds) - set(STACKED_OPTIMIZERS)
        if unknown:
            raise ValueError(f"no stacked step for {sorted(unknown)}")
        self.params, self.grads, self.decays = params, grads, decays
        h = {
            name: hyper[name].tolist() if name in hyper else [0.0] * K
            for name in ("momentum", "beta1", "beta2", "alpha", "eps", "weight_decay")
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
        self.squares = None  # (running squares, scratch for their root) per tensor
        if any(k in _SQUARES for k in self.kinds):
            self.squares = ([torch.zeros_like(p) for p in params], [torch.empty_like(p) for p in params])
        self._coupled = (
            [self._decay_coef(self.coupled, p, d) for p, d in zip(params, decays)] if any(self.coupled) else None
        )
        self._mu_cols = [member_column(h["momentum"], p) for p in params]

    @staticmethod
    def _decay_coef(values, p: torch.Tensor, decay) -> torch.Tensor | None:
        """Per-member ``values`` as a coefficient over p, zero where p does not decay."""
        import torch

        if isinstance(decay, torch.Tensor):
            return member_column(values, p) * decay
        return member_column(values, p) if decay else None

    def step(self, lr: Sequence[float] | torch.Tensor, active: Sequence[bool] | torch.Tensor) -> None:
        """One step with each member's learning rate; members with ``active`` False do not move."""
        import torch

        with torch.no_grad():
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
        import torch

        neg_lr = torch.tensor([-r for r in lr], dtype=self.params[0].dtype)
        classes: dict[tuple, list[int]] = {}
        for k, kind in enumerate(self.kinds):
            if not active[k]:
                continue
            if kind in _ADAM:
                ckey = (kind, lr[k], self.h["beta1"][k], self.h["beta2"][k], self.h["eps"][k])
            elif kind in _SQUARES:
                ckey = (kind, lr[k], self.h["alpha"][k], self.h["eps"][k])
            else:
                ckey = (kind,)
            classes.setdefault(ckey, []).append(k)
        actions = []
        for ckey, rows in classes.items():
            for run in member_runs(rows):
                if ckey[0] in _ADAM:
                    actions.append(self._adam_action(run, *ckey[1:]))
                elif ckey[0] in _SQUARES:
                    actions.append(self._squares_action(ckey[0], run, *ckey[1:]))
                else:
                    actions.append(self._sgd_action(ckey[0], run, neg_lr))
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

    def _squares_action(self, kind: str, run: slice, lr: float, alpha: float, eps: float):
        """torch.optim.RMSprop (alpha, not centered, no momentum) or torch.optim.Adagrad
        (no lr decay, accumulator from 0), written as their single-tensor steps are."""
        import torch

        parts = [(p[run], g[run], s[run], r[run]) for p, g, s, r in zip(self.params, self.grads, *self.squares)]

        def step():
            for p, g, square, root in parts:
                if kind == "rmsprop":
                    square.mul_(alpha).addcmul_(g, g, value=1 - alpha)
                else:
                    square.addcmul_(g, g, value=1)
                p.addcdiv_(g, torch.sqrt(square, out=root).add_(eps), value=-lr)

        return step

    def _adam_action(self, run: slice, lr: float, beta1: float, beta2: float, eps: float):
        import torch

        # one tensor per member and parameter: a run's rows back to back would put a member's
        # elements wherever the kernel's vector blocks and scalar tail fall for that run, so its
        # bits would depend on its neighbours; row by row, every member is stepped alike
        members = range(run.start, run.stop)
        ps = [p[k] for p in self.params for k in members]
        gs = [g[k] for g in self.grads for k in members]
        ms = [m[k] for m in self.moments[0] for k in members]
        vs = [v[k] for v in self.moments[1] for k in members]
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
