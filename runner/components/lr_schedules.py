"""Learning-rate schedules selectable as ``train.schedule``, as a pure function of the step.

Being stateless, a schedule needs no saved state to resume: lr(step) is recomputed.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from runner.recipe.settings import TrainSettings

import math

from runner.errors import RecipeError
from runner.recipe.constraints import Choice, Examples, Integer, Param, Real

__all__ = ["EXAMPLES", "PARAMS", "SCHEDULES", "check_schedule", "lr_at"]

SCHEDULES = ("constant", "cosine", "step", "warmup_cosine")

PARAMS = {
    "schedule": Param(Choice(SCHEDULES), "constant", "learning-rate schedule"),
    "step_every": Param(Integer(1), 10, "step schedule: epochs between decays"),
    "step_gamma": Param(Real(0, 1, low_open=True), 0.1, "step schedule: factor applied at each decay"),
    "warmup_epochs": Param(Integer(0), 0, "warmup_cosine: epochs of linear warm-up from 0"),
}

# Worked examples, walked by tests/test_components.py.
EXAMPLES = {
    "constant": Examples(valid=({"train": {"schedule": "constant"}},)),
    "cosine": Examples(valid=({"train": {"schedule": "cosine", "lr": 0.01}},)),
    "step": Examples(
        valid=({"train": {"schedule": "step", "step_every": 1, "step_gamma": 0.5}},),
        invalid=(({"train": {"schedule": "step", "step_gamma": 0.0}}, "must be > 0"),),
    ),
    "warmup_cosine": Examples(
        valid=({"train": {"schedule": "warmup_cosine", "warmup_epochs": 1, "epochs": 2}},),
        invalid=(
            ({"train": {"schedule": "warmup_cosine", "warmup_epochs": 2, "epochs": 2}}, "warm-up must end before"),
        ),
    ),
}


def lr_at(step: int, steps_per_epoch: int, train: TrainSettings) -> float:
    """Learning rate for optimizer step ``step`` (0-based)."""
    base = train.lr
    kind = train.schedule
    total = steps_per_epoch * train.epochs
    if kind == "constant":
        return base
    if kind == "step":
        return base * train.step_gamma ** ((step // steps_per_epoch) // train.step_every)
    warm = steps_per_epoch * train.warmup_epochs if kind == "warmup_cosine" else 0
    if step < warm:
        return base * (step + 1) / warm
    progress = (step - warm) / max(1, total - warm)
    # Loshchilov & Hutter 2017 (SGDR) cosine annealing to zero, without restarts.
    return base * 0.5 * (1.0 + math.cos(math.pi * min(1.0, progress)))


def check_schedule(train: TrainSettings) -> None:
    if train.schedule == "warmup_cosine" and train.warmup_epochs >= train.epochs:
        raise RecipeError(
            "warm-up must end before training does",
            key="train.warmup_epochs",
            value=train.warmup_epochs,
            allowed=f"a whole number below train.epochs ({train.epochs})",
        )
