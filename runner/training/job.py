"""A job as the pipeline passes it around: what to train (JobSpec) and what came of it
(JobResult). Plain data with no torch, so the grid, the store and the summary can be used
without importing it; the executors send these to workers and back.
"""
from __future__ import annotations

from dataclasses import dataclass, field

__all__ = ["JobSpec", "JobResult"]


@dataclass(frozen=True)
class JobSpec:
    key: str
    seed: int
    settings: dict          # {"data": {...}, "model": {...}, "train": {...}}, fully resolved
    monitor: str            # the rank metric, watched by early stopping
    data_id: str            # the dataset's fingerprint
    checkpoint: str | None = None     # file for mid-job checkpoints (train.checkpoint_every)
    time_limit: float | None = None   # overrides train.time_limit when set (--time-limit)


@dataclass
class JobResult:
    key: str
    status: str             # done | diverged | failed | timeout
    error: str | None = None
    metrics: dict = field(default_factory=dict)      # split -> {metric: value}
    curves: dict = field(default_factory=dict)       # name -> [value per epoch]
    diagnostics: dict = field(default_factory=dict)
    epochs_run: int = 0
    best_epoch: int | None = None
    duration: float = 0.0
    env: dict = field(default_factory=dict)
