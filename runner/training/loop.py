"""The one training loop: the epoch structure every job goes through, whichever backend
computes its steps.

A backend trains K members: one job on the single path (single.py, torch autograd), or a
stacked group of same-shaped jobs (stacked.py; stacked_modules.py for a user's own network).
The loop owns everything that must mean the same on all of them: each step's learning
rate, divergence (a loss that is not finite or exceeds ``diverge_factor`` times the
member's first loss), time limits, the per-epoch curves, early stopping with the best
epoch's weights restored, checkpoints, final scoring on every split, the train-val gap and
the end-of-training diagnostics. A new stopping rule, curve or flag is
written here once; a backend only computes.

``train_item`` is the entry point for a work item (see grouping.py): a stacked group that
fails on the stacked path is retrained one job at a time, and each of its results carries a
note saying so, which the run prints as a warning: a bug in the fast path shows, it does not
hide as a slower run.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any, Protocol

from runner.components.lr_schedules import lr_at
from runner.components.metrics import METRICS, Goal
from runner.datasets.sources import Dataset
from runner.execution import faults
from runner.training import checkpoints, summaries
from runner.training.environment import environment
from runner.training.job import JobResult, JobSpec, Status

__all__ = ["Backend", "OnEpoch", "new_members", "train_group", "train_item", "train_job", "train_members"]


class Backend(Protocol):
    """What the loop needs from a way of computing K members' training steps."""

    members: int
    steps_per_epoch: int
    stacked: bool  # the stacked path (a failure there is retried one job at a time)

    def split_records(self) -> list[dict[str, Any]]:
        """Per member: the sizes of its split and a fingerprint of its test rows."""

    def initial_diagnostics(self) -> list[dict[str, Any]]:
        """Per member: activation and gradient statistics at initialization (no random draw)."""

    def begin_epoch(self) -> None:
        """Draw each member's mini-batch order for the epoch."""

    def losses(self, step: int) -> tuple[list[float], int]:
        """Forward pass of mini-batch ``step`` of the epoch: each member's loss and the rows
        per member; keeps what ``update`` needs."""

    def update(self, lrs: list[float], active: list[bool]) -> None:
        """Backward pass, penalties, clipping, the optimizer step and any proximal step, for
        the active members only, each at its learning rate."""

    def validate(self) -> list[dict[str, float]]:
        """Per member: validation loss and the monitored metric, in eval mode."""

    def snapshot(self, k: int) -> Any:
        """A copy of member k's parameters (its best epoch so far)."""

    def restore(self, k: int, state: Any) -> None: ...

    def final_metrics(self) -> list[dict[str, dict[str, float]]]:
        """Per member and split: every metric (the training split: the monitored one)."""

    def end_diagnostics(self) -> list[dict[str, Any]]:
        """Per member: dead and saturated units, weight sparsity; the scales the flags need:
        ``val_rows``, and ``classes`` (classification) or ``target_std`` (regression: the
        target's std on the training split)."""

    def member_state(self, k: int) -> dict[str, Any]:
        """Member k's weights and buffers as numpy arrays, named as the single-job
        network's state_dict names them (what a bundle rebuilds with models.build_model)."""

    def checkpoint_state(self) -> dict[str, Any]:
        """Model, optimizer and random streams of a single job, for a mid-job checkpoint."""

    def load_checkpoint_state(self, saved: dict[str, Any]) -> None: ...


@dataclass
class _Member:
    """The loop's bookkeeping for one member."""

    spec: JobSpec
    result: JobResult
    curves: dict[str, list[float]]
    time_limit: float
    active: bool = True
    best_value: float | None = None
    best_epoch: int | None = None
    best_state: Any = None
    since_best: int = 0
    first_loss: float | None = None
    extra: dict[str, Any] = field(default_factory=dict)

    def stop(self, status: Status, reason: str, epoch: int) -> None:
        self.result.status, self.result.error = status, reason
        self.result.epochs_run = epoch + 1
        self.result.curves = self.curves
        self.active = False


def new_members(specs: Sequence[JobSpec], env: dict[str, Any]) -> list[_Member]:
    """The loop's bookkeeping for these jobs, each with a result to fill."""
    out = []
    for spec in specs:
        monitor = spec.monitor
        limit = spec.time_limit if spec.time_limit is not None else spec.settings.train.time_limit
        out.append(
            _Member(
                spec=spec,
                result=JobResult(key=spec.key, status=Status.DONE, env=env),
                curves={"train_loss": [], "val_loss": [], f"val_{monitor}": [], "lr": []},
                time_limit=limit,
            )
        )
    return out


OnEpoch = Callable[[float], None]  # the share of a work item's epochs done, 0 to 1


def train_members(
    backend: Backend,
    members: list[_Member],
    start: float,
    checkpoint: str | None = None,
    on_epoch: OnEpoch | None = None,
) -> list[JobResult]:
    """Train the backend's members through every epoch; one JobResult per member. If it
    raises, ``members`` keep what was recorded so far. ``checkpoint``: a single job's
    checkpoint file (train.checkpoint_every). ``on_epoch``: told the share of epochs done
    after each epoch (a long stacked group reports progress before any member finishes)."""
    train0 = members[0].spec.settings.train
    every = train0.checkpoint_every if checkpoint else 0
    step, start_epoch = 0, 0
    saved = checkpoints.load(checkpoint) if every else None
    for m, record in zip(members, backend.split_records()):
        m.result.diagnostics["split"] = {**record, "fold": m.spec.fold}
    if saved is None:
        for m, diags in zip(members, backend.initial_diagnostics()):
            m.result.diagnostics.update(diags)
    else:
        try:
            step, start_epoch = _resume(backend, members[0], saved)
        except Exception as exc:  # wrong shapes or keys, missing fields: the backend is half-loaded
            raise checkpoints.Unfit(f"{type(exc).__name__}: {str(exc)[:200]}") from None
    fault = faults.from_environment()
    for epoch in range(start_epoch, train0.epochs):
        if not any(m.active for m in members):
            break
        if fault is not None:
            fault.maybe_fire(epoch, stacked=backend.stacked)
        step = _epoch(backend, members, epoch, step, start)
        if not any(m.active for m in members):
            break
        _after_validation(backend, members, epoch)
        if on_epoch is not None:
            on_epoch((epoch + 1) / train0.epochs)
        if every and (epoch + 1) % every == 0 and epoch + 1 < train0.epochs and members[0].active:
            _save(backend, members[0], checkpoint, step, epoch)
    _finish(backend, members)
    elapsed = time.perf_counter() - start
    for m in members:
        m.result.duration = elapsed / len(members)  # a group's time, shared equally
    return [m.result for m in members]


def _epoch(backend: Backend, members: list[_Member], epoch: int, step: int, start: float) -> int:
    """One pass over the training split; returns the step count after it."""
    backend.begin_epoch()
    trains = [m.spec.settings.train for m in members]
    spe = backend.steps_per_epoch
    totals, count = [0.0] * len(members), 0
    lrs: list[float] = []
    for b in range(spe):
        lrs = [lr_at(step, spe, t) for t in trains]
        values, rows = backend.losses(b)
        for m, t, v in zip(members, trains, values):
            if m.first_loss is None:
                m.first_loss = v
            if m.active and (not math.isfinite(v) or v > t.diverge_factor * max(m.first_loss, 1e-12)):
                m.curves["train_loss"].append(v)
                m.stop(Status.DIVERGED, f"loss {v:.4g} at epoch {epoch + 1}, step {step + 1}", epoch)
        active = [m.active for m in members]
        if not any(active):
            return step
        backend.update(lrs, active)
        totals = [total + v * rows for total, v in zip(totals, values)]
        count += rows
        step += 1
        elapsed = time.perf_counter() - start
        for m in members:
            if m.active and m.time_limit and elapsed > m.time_limit:
                m.stop(Status.TIMEOUT, f"time limit of {m.time_limit:g} s reached at epoch {epoch + 1}", epoch)
        if not any(m.active for m in members):
            return step
    for m, total, lr in zip(members, totals, lrs):
        if m.active:
            m.extra["epoch_loss"], m.extra["lr"] = total / count, lr
    return step


def _after_validation(backend: Backend, members: list[_Member], epoch: int) -> None:
    """Curves, validation divergence and early stopping at the end of an epoch."""
    vals = backend.validate()
    for k, (m, val) in enumerate(zip(members, vals)):
        if not m.active:
            continue
        monitor = m.spec.monitor
        m.curves["train_loss"].append(m.extra["epoch_loss"])
        m.curves["val_loss"].append(val["loss"])
        m.curves[f"val_{monitor}"].append(val[monitor])
        m.curves["lr"].append(m.extra["lr"])
        m.result.epochs_run = epoch + 1
        if not math.isfinite(val["loss"]):
            m.stop(Status.DIVERGED, f"validation loss {val['loss']} at epoch {epoch + 1}", epoch)
            continue
        current = val[monitor]
        patience = m.spec.settings.train.patience
        if m.best_value is None or METRICS[monitor].goal.better(current, m.best_value):
            m.best_value, m.best_epoch, m.since_best = current, epoch + 1, 0
            if patience > 0:
                m.best_state = backend.snapshot(k)
        else:
            m.since_best += 1
            if patience > 0 and m.since_best >= patience:
                m.active = False  # stopped early: done, with its best epoch's weights


def _finish(backend: Backend, members: list[_Member]) -> None:
    """Final metrics and diagnostics of every member that finished, on its best weights
    (early stopping) or its last."""
    for k, m in enumerate(members):
        if m.best_state is not None:
            backend.restore(k, m.best_state)
    for m in members:
        m.result.curves = m.curves
    if not any(m.result.status is Status.DONE for m in members):
        return
    metrics = backend.final_metrics()
    ends = backend.end_diagnostics()
    for k, (m, per_split, end) in enumerate(zip(members, metrics, ends)):
        r = m.result
        if r.status is not Status.DONE:
            continue
        monitor = m.spec.monitor
        r.best_epoch = m.best_epoch if m.spec.settings.train.patience > 0 else r.epochs_run
        r.metrics.update(per_split)
        r.diagnostics.update(end)
        if m.spec.keep_weights:
            r.weights = backend.member_state(k)
        if r.metrics.get("train") and r.metrics.get("val"):
            tr, va = r.metrics["train"][monitor], r.metrics["val"][monitor]
            r.diagnostics["gap"] = (tr - va) if METRICS[monitor].goal is Goal.MAX else (va - tr)
        r.diagnostics.update(_summaries(m, r))


def _summaries(m: _Member, r: JobResult) -> dict[str, Any]:
    """What the flags read of a finished job's curves and final metrics (summaries.py)."""
    monitor, train = m.spec.monitor, m.spec.settings.train
    d = r.diagnostics
    out: dict[str, Any] = {
        **summaries.tail_trend(m.curves[f"val_{monitor}"], METRICS[monitor].goal is Goal.MAX, train.epochs),
        "best_epoch_share": summaries.best_epoch_share(r.best_epoch, train.epochs, train.patience),
        "loss_rise": summaries.loss_rise(m.curves["train_loss"]),
    }
    if d.get("gap") is not None:
        out["gap_scaled"] = summaries.scaled_gap(d["gap"], monitor, d.get("target_std"), d.get("classes"))
    val = r.metrics.get("val", {})
    if "accuracy" in val and "log_loss" in val and d.get("val_rows") and d.get("classes"):
        out.update(summaries.calibration(val["accuracy"], val["log_loss"], d["val_rows"], d["classes"]))
    return out


def _save(backend: Backend, m: _Member, path: str, step: int, epoch: int) -> None:
    failed = checkpoints.save(
        path,
        {
            **backend.checkpoint_state(),
            "curves": m.curves,
            "diagnostics": m.result.diagnostics,
            "best_value": m.best_value,
            "best_epoch": m.best_epoch,
            "best_state": m.best_state,
            "since_best": m.since_best,
            "first_loss": m.first_loss,
            "step": step,
            "epoch": epoch + 1,
        },
    )
    if failed and not any(n.startswith("a checkpoint could not be saved") for n in m.result.notes):
        m.result.notes.append(f"a checkpoint could not be saved ({failed}); the job went on without it")


def _resume(backend: Backend, m: _Member, saved: dict[str, Any]) -> tuple[int, int]:
    """Continue a single job from its checkpoint: (step, first epoch)."""
    backend.load_checkpoint_state(saved)
    m.curves = saved["curves"]
    m.best_value, m.best_epoch, m.best_state = saved["best_value"], saved["best_epoch"], saved["best_state"]
    m.since_best, m.first_loss = saved["since_best"], saved["first_loss"]
    m.result.diagnostics = {**m.result.diagnostics, **saved["diagnostics"], "resumed_from_epoch": saved["epoch"]}
    return saved["step"], saved["epoch"]


def train_job(spec: JobSpec, ds: Dataset, keep_model: bool = False, on_epoch: OnEpoch | None = None):
    """Train one job on the single path. Never raises for the job's own failure: it is
    returned as status "failed". With ``keep_model``: (trained network or None, result)."""
    from runner.training.single import SingleBackend

    start = time.perf_counter()
    members = new_members([spec], environment())
    backend = None
    try:
        try:
            backend = SingleBackend(spec, ds)
            result = train_members(backend, members, start, checkpoint=spec.checkpoint, on_epoch=on_epoch)[0]
        except checkpoints.Unfit as unfit:  # a damaged checkpoint costs the head start, not the job
            checkpoints.remove(spec.checkpoint)
            members = new_members([spec], environment())
            backend = SingleBackend(spec, ds)
            result = train_members(backend, members, start, checkpoint=spec.checkpoint, on_epoch=on_epoch)[0]
            result.notes.append(f"its checkpoint did not fit the model ({unfit}); trained from scratch")
    except Exception as exc:  # a job's bug or bad numbers must not stop the grid
        result = members[0].result  # what was recorded before the failure
        result.status, result.error = Status.FAILED, f"{type(exc).__name__}: {exc}"
        result.curves, result.metrics = members[0].curves, {}
        result.duration = time.perf_counter() - start
    if keep_model:
        return (backend.net if backend is not None else None), result
    return result


def train_group(specs: Sequence[JobSpec], ds: Dataset, on_epoch: OnEpoch | None = None) -> list[JobResult]:
    """Train same-shaped jobs together on the stacked path. If the stacked computation
    itself fails, each job is retrained on its own and its result carries a note saying so."""
    if specs[0].settings.model.kind in ("python", "cnn"):  # a user's network or a CNN: through torch.func
        from runner.training.stacked_modules import ModuleStackBackend as StackedBackend
    else:
        from runner.training.stacked import StackedBackend

    specs = list(specs)
    start = time.perf_counter()
    try:
        backend = StackedBackend(specs, ds)
        results = train_members(backend, new_members(specs, environment()), start, on_epoch=on_epoch)
        for r in results:
            r.group = tuple(s.key for s in specs)
        return results
    except Exception as exc:
        note = (
            f"the stacked path failed for its group of {len(specs)} ({type(exc).__name__}: {exc}); "
            "trained on its own instead"
        )
        results = _one_by_one(specs, ds, on_epoch)
        for r in results:
            r.notes.append(note)
        return results


def _one_by_one(specs: Sequence[JobSpec], ds: Dataset, on_epoch: OnEpoch | None) -> list[JobResult]:
    """Each job on the single path in turn; progress counted over all of them."""
    results: list[JobResult] = []
    for i, spec in enumerate(specs):
        share = None if on_epoch is None else (lambda f, i=i: on_epoch((i + f) / len(specs)))
        results.append(train_job(spec, ds, on_epoch=share))
    return results


def train_item(
    item: tuple[JobSpec, ...], datasets: dict[str, Dataset], on_epoch: OnEpoch | None = None
) -> list[JobResult]:
    """Train one work item: a single job, or a stacked group of same-shaped jobs."""
    from runner.training.grouping import Stacked

    ds = datasets[item[0].data_id]
    if isinstance(item, Stacked):
        return train_group(item, ds, on_epoch)
    return _one_by_one(item, ds, on_epoch)
