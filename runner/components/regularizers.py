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

from runner.recipe.constraints import Choice, Examples, Param, Real

if TYPE_CHECKING:  # annotations only; torch is imported where it is used
    import torch

    from runner.recipe.settings import TrainSettings

__all__ = ["EXAMPLES", "PARAMS", "penalty", "proximal_l1_", "soft_threshold_", "sparsity"]

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

# Worked examples, walked by tests/test_components.py (one per kind of penalty).
EXAMPLES = {
    "l2": Examples(
        valid=({"train": {"l2": 1e-3}},),
        invalid=(({"train": {"l2": -1e-3}}, "must be >= 0"),),
    ),
    "l1 penalty": Examples(valid=({"train": {"l1": 1e-3, "l1_mode": "penalty"}},)),
    "l1 proximal": Examples(
        valid=({"train": {"l1": 1e-3, "l1_mode": "proximal", "optimizer": "sgd", "lr": 0.1}},),
        invalid=(({"train": {"l1_mode": "prox"}}, "unknown choice"),),
    ),
    "dropout": Examples(
        valid=({"model": {"dropout": 0.3, "input_dropout": 0.1}},),
        invalid=(({"model": {"dropout": 1.0}}, "must be < 1"),),
    ),
    "early stopping": Examples(valid=({"train": {"patience": 2, "epochs": 4}},)),
}


def penalty(weights: list[torch.Tensor], train: TrainSettings) -> torch.Tensor | None:
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


# The stacked form: the same penalties over K members' (K, P) parameter rows. The stacked
# backend has no autograd graph, so a loss term is its gradient added to the members' rows.


class StackedPenalties:
    """Each member's L2 and L1 (penalty or proximal) on its weights only: per-member strength
    times the 0/1 weight mask over a (K, P) parameter buffer. Members without a penalty are
    not touched (a grid's L2 factor leaves part of a group at 0)."""

    def __init__(self, trains: list[TrainSettings], flat: torch.Tensor, gflat: torch.Tensor, is_weight: torch.Tensor):
        self.flat, self.is_weight = flat, is_weight
        self.l2 = self._runs([2.0 * t.l2 for t in trains], flat, gflat, is_weight)  # gradient of l2 * sum(w^2)
        self.l1 = self._runs([t.penalty_l1 for t in trains], flat, gflat, is_weight)
        self.prox = [t.proximal_l1 for t in trains]

    @staticmethod
    def _runs(strengths: list[float], flat, gflat, is_weight) -> list[tuple]:
        """(gradient rows, weight rows, coefficient) for each contiguous run of members with
        a nonzero strength."""
        from runner.components.optimizers import member_column, member_runs

        rows = [k for k, v in enumerate(strengths) if v]
        coef = member_column(strengths, flat) * is_weight
        return [(gflat[run], flat[run], coef[run]) for run in member_runs(rows)]

    def add_gradients(self) -> None:
        """Add the L2 and L1-penalty gradients to the members' gradient rows."""
        import torch

        for g, w, coef in self.l2:
            g.addcmul_(w, coef)
        for g, w, coef in self.l1:
            g.addcmul_(torch.sign(w), coef)

    def proximal_step(self, lrs: list[float], active: list[bool]) -> None:
        """Soft-threshold the active members' weights by lr * l1 (biases get threshold 0)."""
        if not any(self.prox):
            return
        from runner.components.optimizers import member_column

        thr = [r * lam if a else 0.0 for r, lam, a in zip(lrs, self.prox, active)]
        soft_threshold_(self.flat, member_column(thr, self.flat) * self.is_weight)
