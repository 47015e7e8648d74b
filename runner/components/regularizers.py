"""Explicit regularizers: L2 and L1 penalties, and the proximal L1 step.

Conventions (stated because libraries differ):
- ``train.l2 = lam`` adds lam * sum(w^2) to the loss (gradient 2*lam*w). torch's
  ``weight_decay = wd`` with SGD equals l2 = wd / 2; with AdamW it is decoupled and differs.
- ``train.l1 = lam`` adds lam * sum(|w|). With ``l1_mode = "penalty"`` the subgradient goes
  through autograd and weights only get near zero. With ``l1_mode = "proximal"`` the penalty
  is left out of the loss and, after each optimizer step, weights are soft-thresholded by
  lr_t * lam (proximal gradient / ISTA, Beck & Teboulle 2009), which yields exact zeros.
Penalties cover weight matrices only, never biases or normalization parameters.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from runner.recipe.constraints import Choice, Param, Real

if TYPE_CHECKING:  # annotations only; torch is imported where it is used
    import torch

__all__ = ["PARAMS", "penalty", "proximal_l1_", "soft_threshold_", "sparsity"]

PARAMS = {
    "l2": Param(Real(0, None), 0.0, "L2 penalty lam * sum(w^2) added to the loss"),
    "l1": Param(Real(0, None), 0.0, "L1 strength lam * sum(|w|)"),
    "l1_mode": Param(
        Choice(("penalty", "proximal")),
        "penalty",
        "penalty: subgradient in the loss; proximal: soft-threshold after each step",
    ),
    "sparsity_tol": Param(Real(0, None), 1e-3, "|w| below this counts as near zero in the sparsity report"),
}


def penalty(weights: list[torch.Tensor], train: dict) -> torch.Tensor | None:
    """The explicit penalty term to add to the loss, or None when there is none."""
    total = None
    if train.l2 > 0:
        total = train.l2 * sum((w * w).sum() for w in weights)
    if train.l1 > 0 and train.l1_mode == "penalty":
        l1 = train.l1 * sum(w.abs().sum() for w in weights)
        total = l1 if total is None else total + l1
    return total


def soft_threshold_(w: torch.Tensor, threshold: float) -> torch.Tensor:
    """w <- sign(w) * max(|w| - threshold, 0), in place (the proximal map of threshold*|w|)."""
    import torch  # here and below on first use: validating a recipe needs only PARAMS

    with torch.no_grad():
        shrunk = w.abs().sub_(threshold).clamp_(min=0.0)
        return w.copy_(shrunk.mul_(torch.sign(w)))


def proximal_l1_(weights: list[torch.Tensor], lr: float, lam: float) -> None:
    for w in weights:
        soft_threshold_(w, lr * lam)


def sparsity(weights: list[torch.Tensor], tol: float) -> dict[str, float]:
    import torch

    total = sum(w.numel() for w in weights)
    if total == 0:
        return {"zero_fraction": 0.0, "near_zero_fraction": 0.0}
    with torch.no_grad():
        zeros = sum(int((w == 0).sum()) for w in weights)
        near = sum(int((w.abs() < tol).sum()) for w in weights)
    return {"zero_fraction": zeros / total, "near_zero_fraction": near / total}
