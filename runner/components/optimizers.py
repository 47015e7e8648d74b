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
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import TYPE_CHECKING

from runner.errors import RecipeError
from runner.recipe.constraints import Param, Real

if TYPE_CHECKING:  # annotations only; torch is imported where it is used
    import torch

__all__ = ["HYPERPARAMS", "OPTIMIZERS", "build_optimizer", "check_optimizer"]

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


def check_optimizer(train: dict) -> None:
    """Rules that span two settings."""
    if train.optimizer in ("momentum", "nesterov") and train.momentum <= 0:
        raise RecipeError(
            f"{train.optimizer} needs momentum > 0",
            key="train.momentum",
            value=train.momentum,
            allowed="a number in (0, 1)",
            hint='Use optimizer = "sgd" for plain gradient descent',
        )


def build_optimizer(model: torch.nn.Module, train: dict) -> torch.optim.Optimizer:
    """Weight matrices get ``weight_decay``; biases and normalization parameters get none."""
    decay, no_decay = split_parameters(model)
    groups = [{"params": decay, "weight_decay": train.weight_decay}, {"params": no_decay, "weight_decay": 0.0}]
    groups = [g for g in groups if g["params"]]
    return OPTIMIZERS[train.optimizer].build(groups, train)


def split_parameters(model: torch.nn.Module) -> tuple[list, list]:
    """(weights of linear/conv layers, everything else: biases and normalization)."""
    import torch

    decay, no_decay = [], []
    for module in model.modules():
        for name, param in module.named_parameters(recurse=False):
            is_weight = name == "weight" and isinstance(module, (torch.nn.Linear, torch.nn.Conv2d))
            (decay if is_weight else no_decay).append(param)
    return decay, no_decay
