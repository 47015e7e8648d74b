"""A job as the pipeline passes it around: what to train (JobSpec) and what came of it
(JobResult), with its end state (Status). Plain data with no torch, so the grid, the store
and the leaderboard can be used without importing it; the executors send these to workers
and back.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from enum import Enum
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from runner.recipe.module_file import ModuleSource
    from runner.recipe.settings import Settings

__all__ = ["FINISHED", "JobResult", "JobSpec", "Status"]


class Status(str, Enum):
    """How a job ended. Every finished job is stored with one of these; a job with no
    stored result is pending."""

    DONE = "done"
    DIVERGED = "diverged"
    FAILED = "failed"
    TIMEOUT = "timeout"

    def __str__(self) -> str:
        return self.value


FINISHED = tuple(Status)


@dataclass(frozen=True)
class JobSpec:
    key: str
    seed: int
    settings: Settings  # fully resolved
    monitor: str  # the rank metric, watched by early stopping
    data_id: str  # the dataset's fingerprint
    checkpoint: str | None = None  # file for mid-job checkpoints (train.checkpoint_every)
    time_limit: float | None = None  # overrides train.time_limit when set (--time-limit)
    fold: int | None = None  # k-fold validation: the fold this job validates on
    keep_weights: bool = False  # send the trained weights back with the result
    module: ModuleSource | None = None  # model.kind = "python": the network's source travels with the job


@dataclass
class JobResult:
    key: str
    status: Status
    error: str | None = None
    metrics: dict[str, dict[str, float]] = field(default_factory=dict)  # split -> {metric: value}
    curves: dict[str, list[float]] = field(default_factory=dict)  # name -> [value per epoch]
    diagnostics: dict[str, Any] = field(default_factory=dict)
    epochs_run: int = 0
    best_epoch: int | None = None
    duration: float = 0.0
    env: dict[str, Any] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)  # what the user should know of how it ran
    # The trained network's state (final or early-stopping weights) by the single-job
    # network's state_dict names, when the spec asked for it and the job is done.
    weights: dict[str, Any] | None = None
    # How it trained: the keys of its stacked group in order (its own among them), or ()
    # for a job trained on its own. A stacked member's last bits depend on its group, so a
    # bitwise retrain must train the same group again.
    group: tuple[str, ...] = ()
