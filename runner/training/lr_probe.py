"""A learning-rate range test: which rates are worth a grid's seeds, before it runs.

One short seeded run of a configuration on its training split, the rate growing by a fixed
factor every mini-batch from ``LR_MIN`` to ``LR_MAX`` (the range test of Smith 2017,
"Cyclical learning rates for training neural networks"), recording the training loss of
each mini-batch before its step. The loss is smoothed (an exponential moving average with
bias correction, weight ``SMOOTHING``: common practice) and the run stops where the
smoothed loss passes ``BLOWUP`` times its lowest value or stops being finite: that rate is
the *blow-up* rate. The *steepest* rate is where the smoothed loss falls fastest per unit
of log-rate, before its minimum; the suggested levels are three log-spaced rates around
it, kept at least a factor ``MARGIN`` below the blow-up. Both thresholds are rules of thumb
(common practice), not derived; the blow-up rate has a check where theory gives the
answer: full-batch gradient descent on least squares diverges past 2/L, L the largest
eigenvalue of the loss's Hessian (tests/test_lr_probe.py).

The probe trains the configuration's own network with its optimizer (penalties and
dropout off: the rate's scale is the question), so it costs ``steps`` mini-batches.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from runner.datasets.sources import Dataset
from runner.training.job import JobSpec

__all__ = ["LR_MAX", "LR_MIN", "Probe", "probe", "probed_jobs", "suggest"]

LR_MIN, LR_MAX = 1e-6, 10.0
STEPS = 200
SMOOTHING = 0.9  # weight of the past in the moving average (common practice: 0.9-0.98)
BLOWUP = 4.0  # the smoothed loss past this multiple of its lowest value: blown up (common practice)
MARGIN = 3.0  # suggested levels stay this factor below the blow-up rate


@dataclass(frozen=True)
class Probe:
    optimizer: str
    rates: list[float]  # the rate of each mini-batch recorded
    losses: list[float]  # its training loss, smoothed
    steepest: float | None  # where the smoothed loss falls fastest
    blowup: float | None  # where it blew up (None: not within LR_MAX)
    levels: list[float]  # three rates worth trying

    def to_json(self) -> dict[str, Any]:
        return {
            "optimizer": self.optimizer,
            "rates": self.rates,
            "losses": self.losses,
            "steepest": self.steepest,
            "blowup": self.blowup,
            "levels": self.levels,
        }


def probed_jobs(grid) -> dict[str, tuple[str, Any]]:
    """Optimizer -> (the probe's identity in the store, the job it runs as): the grid's first
    job with each optimizer."""
    out: dict[str, tuple[str, Any]] = {}
    for job in grid:
        optimizer = job.config.settings.train.optimizer
        if optimizer not in out:
            out[optimizer] = (f"{job.key}:lr-probe-1", job)
    return out


def probe(spec: JobSpec, ds: Dataset, steps: int = STEPS, lr_min: float = LR_MIN, lr_max: float = LR_MAX) -> Probe:
    """The range test of ``spec``'s configuration on its seed's training split."""
    import dataclasses

    import torch
    import torch.nn.functional as F

    from runner.components.metrics import Task
    from runner.components.optimizers import build_optimizer
    from runner.datasets.splits import split_and_scale
    from runner.training.models import build_model
    from runner.training.streams import streams

    settings = spec.settings
    model = dataclasses.replace(settings.model, dropout=0.0)
    train = dataclasses.replace(settings.train, lr=lr_min, weight_decay=0.0)
    sp = split_and_scale(ds, settings.data, spec.seed, spec.fold)
    classify = ds.task is Task.CLASSIFICATION
    X = torch.from_numpy(np.ascontiguousarray(sp.X_train))
    y = (
        torch.from_numpy(sp.y_train.astype(np.int64))
        if classify
        else torch.from_numpy(((sp.y_train - sp.y_mean) / sp.y_std).astype(np.float32))
    )
    init, order, drop = streams(spec.seed)
    net = build_model(model, tuple(X.shape[1:]), len(ds.classes) if classify else 1, init, drop, spec.module)
    opt = build_optimizer(net, train)
    n, batch = len(X), train.batch_rows(len(X))
    factor = (lr_max / lr_min) ** (1.0 / max(1, steps - 1))
    rates, raw = [], []
    perm, at = torch.randperm(n, generator=order), 0
    for step in range(steps):
        lr = lr_min * factor**step
        for group in opt.param_groups:
            group["lr"] = lr
        if at + batch > n:
            perm, at = torch.randperm(n, generator=order), 0
        rows = perm[at : at + batch]
        at += batch
        out = net(X[rows])
        loss = F.cross_entropy(out, y[rows]) if classify else F.mse_loss(out.squeeze(1), y[rows])
        value = float(loss.detach())
        rates.append(lr)
        raw.append(value)
        if not math.isfinite(value) or _blown(raw):
            break
        opt.zero_grad(set_to_none=True)
        loss.backward()
        opt.step()
    return summarize(settings.train.optimizer, rates, raw)


def _smooth(raw: list[float]) -> list[float]:
    out, avg = [], 0.0
    for i, v in enumerate(raw, 1):
        avg = SMOOTHING * avg + (1 - SMOOTHING) * v
        out.append(avg / (1 - SMOOTHING**i))
    return out


def _blown(raw: list[float]) -> bool:
    smooth = _smooth(raw)
    return smooth[-1] > BLOWUP * min(smooth)


def summarize(optimizer: str, rates: list[float], raw: list[float]) -> Probe:
    """The probe's reading of one recorded run (rates and raw losses, in order)."""
    finite = [v if math.isfinite(v) else math.inf for v in raw]
    blown = len(finite) > 1 and (not math.isfinite(finite[-1]) or _blown(finite))
    kept = finite[:-1] if blown else finite
    smooth = _smooth(kept) if kept else []
    steepest = None
    lowest = int(np.argmin(smooth)) if smooth else 0
    logs = np.log(rates[: lowest + 1])
    if lowest >= 2:
        # the fall over a window of half a decade of rate (mini-batch noise averages out over
        # it), the window's middle rate where it is steepest
        span = max(1, int(np.searchsorted(logs, logs[0] + 0.5 * np.log(10))))
        ends = range(span, lowest + 1)
        slopes = [(smooth[i] - smooth[i - span]) / (logs[i] - logs[i - span]) for i in ends]
        if slopes and min(slopes) < 0:
            i = ends[int(np.argmin(slopes))]
            steepest = float(np.exp((logs[i] + logs[i - span]) / 2))
    blowup = float(rates[len(finite) - 1]) if blown else None
    return Probe(optimizer, rates[: len(smooth)], smooth, steepest, blowup, suggest(steepest, blowup))


def suggest(steepest: float | None, blowup: float | None) -> list[float]:
    """Three log-spaced rates around the steepest descent, each at least MARGIN below the
    blow-up rate; rounded to one significant digit."""
    if steepest is None:
        return []
    levels = [steepest / math.sqrt(10), steepest, steepest * math.sqrt(10)]
    if blowup is not None:
        levels = [min(v, blowup / MARGIN) for v in levels]
    out: list[float] = []
    for v in levels:
        r = float(f"{v:.1g}")
        if r not in out:
            out.append(r)
    return out
