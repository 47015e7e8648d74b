"""Train one job: one configuration with one seed, on the CPU, from pre-built tensors.

Every random draw comes from generators seeded by the job's seed: the split
(scikit-learn's random_state), initialization, mini-batch order and dropout masks each get
their own stream. With torch's deterministic algorithms and a fixed thread count, the same
job gives bitwise-identical numbers on the same machine.
"""
from __future__ import annotations

import math
import os
import platform
import sys
import time
import numpy as np
import torch
import torch.nn.functional as F

from runner.training import checkpoints as checkpoint

from runner.training import diagnostics

from runner.execution import faults

from runner.components import regularizers
from runner.datasets.sources import Dataset, split_and_scale
from runner.training.job import JobResult, JobSpec
from runner.components.metrics import METRICS, evaluate, quick
from runner.training.models import build_model, weight_tensors
from runner.components.optimizers import build_optimizer
from runner.components.lr_schedules import lr_at

__all__ = ["JobSpec", "JobResult", "run_job", "train_model", "environment", "score", "streams"]


def environment() -> dict:
    import sklearn

    cpu = platform.processor() or platform.machine()
    try:
        with open("/proc/cpuinfo") as f:
            for line in f:
                if line.startswith("model name"):
                    cpu = line.split(":", 1)[1].strip()
                    break
    except OSError:
        pass
    return {"python": sys.version.split()[0], "torch": torch.__version__, "numpy": np.__version__,
            "sklearn": sklearn.__version__, "threads": torch.get_num_threads(), "cpu": cpu,
            "pid": os.getpid()}


def streams(seed: int) -> tuple[torch.Generator, torch.Generator, torch.Generator]:
    init_s, shuffle_s, drop_s = np.random.SeedSequence(seed).generate_state(3)
    return tuple(torch.Generator().manual_seed(int(s)) for s in (init_s, shuffle_s, drop_s))


class _Stop(Exception):
    def __init__(self, status: str, reason: str):
        self.status, self.reason = status, reason


def run_job(spec: JobSpec, ds: Dataset) -> JobResult:
    """Never raises for a job's own failure: it is returned as status "failed"."""
    return train_model(spec, ds)[1]


def train_model(spec: JobSpec, ds: Dataset):
    """(trained network or None, JobResult). The network is what the metrics were taken on."""
    start = time.perf_counter()
    result = JobResult(key=spec.key, status="done", env=environment())
    net = None
    try:
        net = _train(spec, ds, result, start)
    except _Stop as stop:
        result.status, result.error = stop.status, stop.reason
    except Exception as exc:  # a job's bug or bad numbers must not stop the grid
        result.status, result.error = "failed", f"{type(exc).__name__}: {exc}"
    result.duration = time.perf_counter() - start
    return net, result


def _train(spec: JobSpec, ds: Dataset, result: JobResult, start: float):
    data, model_s, train = spec.settings["data"], spec.settings["model"], spec.settings["train"]
    sp = split_and_scale(ds, data, spec.seed)
    classify = ds.task == "classification"
    n_out = len(ds.classes) if classify else 1

    def tensors(X, y):
        Xt = torch.from_numpy(np.ascontiguousarray(X))
        if classify:
            return Xt, torch.from_numpy(y.astype(np.int64))
        return Xt, torch.from_numpy(((y - sp.y_mean) / sp.y_std).astype(np.float32))

    Xtr, ytr = tensors(sp.X_train, sp.y_train)
    Xva, _ = tensors(sp.X_val, sp.y_val)
    init_gen, shuffle_gen, drop_gen = streams(spec.seed)
    in_shape = tuple(Xtr.shape[1:])
    net = build_model(model_s, in_shape, n_out, init_gen, drop_gen)
    opt = build_optimizer(net, train)
    weights = weight_tensors(net)

    def loss_fn(out, y):
        return F.cross_entropy(out, y) if classify else F.mse_loss(out.squeeze(1), y)

    probe = slice(0, min(diagnostics.PROBE_ROWS, len(Xtr)))
    every = train["checkpoint_every"] if spec.checkpoint else 0
    saved = checkpoint.load(spec.checkpoint) if every else None
    if saved is None:
        result.diagnostics.update(diagnostics.at_init(net, Xtr[probe], ytr[probe], loss_fn))

    n = len(Xtr)
    bs = n if train["batch_size"] == "full" else min(int(train["batch_size"]), n)
    steps_per_epoch = math.ceil(n / bs)
    goal_max = METRICS[spec.monitor][1] == "max"
    curves = {"train_loss": [], "val_loss": [], f"val_{spec.monitor}": [], "lr": []}
    best_value, best_epoch, best_state, since_best = None, None, None, 0
    first_loss = None
    limit = spec.time_limit if spec.time_limit is not None else train["time_limit"]
    step, start_epoch = 0, 0
    if saved is not None:
        net.load_state_dict(saved["model"])
        opt.load_state_dict(saved["optimizer"])
        shuffle_gen.set_state(saved["shuffle_rng"])
        drop_gen.set_state(saved["dropout_rng"])
        curves, result.diagnostics = saved["curves"], saved["diagnostics"]
        best_value, best_epoch, best_state = saved["best_value"], saved["best_epoch"], saved["best_state"]
        since_best, first_loss, step, start_epoch = (saved["since_best"], saved["first_loss"],
                                                     saved["step"], saved["epoch"])
        result.diagnostics = {**result.diagnostics, "resumed_from_epoch": start_epoch}
    fault = faults.from_environment()
    for epoch in range(start_epoch, train["epochs"]):
        if fault is not None:
            fault.maybe_fire(epoch)
        net.train()
        order = torch.randperm(n, generator=shuffle_gen)
        total, count = 0.0, 0
        for b in range(steps_per_epoch):
            idx = order[b * bs:(b + 1) * bs]
            lr = lr_at(step, steps_per_epoch, train)
            for group in opt.param_groups:
                group["lr"] = lr
            opt.zero_grad(set_to_none=True)
            loss = loss_fn(net(Xtr[idx]), ytr[idx])
            value = loss.item()
            if first_loss is None:
                first_loss = value
            if not math.isfinite(value) or value > train["diverge_factor"] * max(first_loss, 1e-12):
                curves["train_loss"].append(value)
                result.curves, result.epochs_run = curves, epoch + 1
                raise _Stop("diverged", f"loss {value:.4g} at epoch {epoch + 1}, step {step + 1}")
            penalty = regularizers.penalty(weights, train)
            (loss if penalty is None else loss + penalty).backward()
            if train["clip_norm"] > 0:
                torch.nn.utils.clip_grad_norm_(net.parameters(), train["clip_norm"])
            opt.step()
            if train["l1"] > 0 and train["l1_mode"] == "proximal":
                regularizers.proximal_l1_(weights, lr, train["l1"])
            total += value * len(idx)
            count += len(idx)
            step += 1
            if limit and time.perf_counter() - start > limit:
                result.curves, result.epochs_run = curves, epoch + 1
                raise _Stop("timeout", f"time limit of {limit:g} s reached at epoch {epoch + 1}")
        val = _evaluate(net, Xva, sp.y_val, ds, sp, only=spec.monitor)
        curves["train_loss"].append(total / count)
        curves["val_loss"].append(val["loss"])
        curves[f"val_{spec.monitor}"].append(val[spec.monitor])
        curves["lr"].append(lr)
        result.epochs_run = epoch + 1
        if not math.isfinite(val["loss"]):
            result.curves = curves
            raise _Stop("diverged", f"validation loss {val['loss']} at epoch {epoch + 1}")
        current = val[spec.monitor]
        improved = best_value is None or (current > best_value if goal_max else current < best_value)
        if improved:
            best_value, best_epoch, since_best = current, epoch + 1, 0
            if train["patience"] > 0:
                best_state = {k: v.clone() for k, v in net.state_dict().items()}
        else:
            since_best += 1
            if train["patience"] > 0 and since_best >= train["patience"]:
                break
        if every and (epoch + 1) % every == 0 and epoch + 1 < train["epochs"]:
            checkpoint.save(spec.checkpoint, {
                "model": net.state_dict(), "optimizer": opt.state_dict(),
                "shuffle_rng": shuffle_gen.get_state(), "dropout_rng": drop_gen.get_state(),
                "curves": curves, "diagnostics": result.diagnostics, "best_value": best_value,
                "best_epoch": best_epoch, "best_state": best_state, "since_best": since_best,
                "first_loss": first_loss, "step": step, "epoch": epoch + 1})
    if best_state is not None:
        net.load_state_dict(best_state)  # early stopping keeps the best epoch's weights
    result.best_epoch = best_epoch if train["patience"] > 0 else result.epochs_run
    result.curves = curves
    for split, X, y in (("train", sp.X_train, sp.y_train), ("val", sp.X_val, sp.y_val),
                        ("test", sp.X_test, sp.y_test)):
        if X is not None:
            # val and test: every metric; train: the monitored metric only (it feeds the
            # overfitting gap).
            out = _evaluate(net, torch.from_numpy(np.ascontiguousarray(X)), y, ds, sp,
                            only=spec.monitor if split == "train" else None)
            out.pop("loss")
            result.metrics[split] = out
    result.diagnostics.update(diagnostics.at_end(net, Xtr[probe], model_s["activation"]))
    result.diagnostics.update(regularizers.sparsity(weights, train["sparsity_tol"]))
    if result.metrics.get("train") and result.metrics.get("val"):
        tr, va = result.metrics["train"][spec.monitor], result.metrics["val"][spec.monitor]
        result.diagnostics["gap"] = (tr - va) if goal_max else (va - tr)
    return net


@torch.no_grad()
def _evaluate(net, X: torch.Tensor, y: np.ndarray, ds: Dataset, sp, only: str | None = None) -> dict[str, float]:
    """Metrics in eval mode (dropout off, batch-norm running statistics)."""
    net.eval()
    out = net(X)
    net.train()
    return score(out, y, ds, sp, only)


@torch.no_grad()
def score(out: torch.Tensor, y: np.ndarray, ds: Dataset, sp, only: str | None = None) -> dict[str, float]:
    """Loss and metrics of a network's raw outputs ``out`` for targets ``y``: all metrics of
    the task (metrics.py), or with ``only`` just that one (for per-epoch curves)."""
    if not torch.isfinite(out).all():
        names = [only] if only else [m for m, (task, _) in METRICS.items() if task == ds.task]
        return {**{m: float("nan") for m in names}, "loss": float("nan")}
    if ds.task == "classification":
        loss = float(F.cross_entropy(out, torch.from_numpy(y.astype(np.int64))))
        probs = torch.softmax(out.double(), dim=1).numpy()
        metrics = ({only: quick(only, y, probs, len(ds.classes))} if only
                   else evaluate("classification", y, probs, len(ds.classes)))
    else:
        pred = out.squeeze(1).double().numpy() * sp.y_std + sp.y_mean
        loss = float(np.mean(((y - sp.y_mean) / sp.y_std - out.squeeze(1).double().numpy()) ** 2))
        metrics = {only: quick(only, y, pred)} if only else evaluate("regression", y, pred)
    metrics["loss"] = loss
    return metrics
