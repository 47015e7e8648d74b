"""Stacked execution: train K same-shaped MLP jobs as one computation.

On a CPU a small MLP's step is dominated by per-operation overhead, so K jobs whose tensor
shapes agree share every kernel launch: parameters get a leading member axis and layers run
as batched matrix products (torch.baddbmm). Each member keeps everything that makes it its
own job: its split and scaling, initialization, mini-batch order and dropout masks from its
own seed's generators (the same draws as the single-job path), and its own learning rate,
schedule, momentum, betas, eps, weight decay, L1/L2 strength, dropout rate, clipping,
patience and divergence threshold, held as per-member tensors.

The network math is in stacked_mlp (forward and backward written out over the member axis)
and the optimizer steps in stacked_optim (members of different optimizer kinds can share a
group). Members that diverge or stop early are left out of the optimizer's steps without
disturbing the others. Metrics and diagnostics go through the same functions as the
single-job path. Results agree with the single-job path to floating-point summation order,
not bit for bit (see DEVELOPERS.md for the measured tolerance); each path on its own is
bitwise reproducible.

Group size is bounded by ``GROUP_SIZE`` and by an estimate of the group's memory
(``member_bytes``) against ``MEMORY_BUDGET`` per worker process; a bucket of stackable jobs
is cut into groups of near-equal size.
"""
from __future__ import annotations

import math
import time
from collections import OrderedDict
from typing import Sequence

import numpy as np
import torch

from runner.training import diagnostics

from runner.execution import faults

from runner.components import regularizers
from runner.components.activations import gain
from runner.datasets.sources import Dataset, split_and_scale
from runner.recipe.grid import canonical
from runner.components.initializers import initialize
from runner.components.metrics import METRICS, for_task, quick
from runner.components.lr_schedules import lr_at
from runner.training.stacked_network import StackedMLP, cross_entropy_grad, mse_grad
from runner.components.stacked_optim import STACKED_OPTIMIZERS, StackedOptimizer, member_runs
from runner.training.single import JobResult, JobSpec, environment, run_job, streams

__all__ = ["Stacked", "stack_key", "group_specs", "describe", "run_group", "member_bytes", "GROUP_SIZE", "MEMORY_BUDGET"]

GROUP_SIZE = 16  # members per stacked group: enough to share the per-operation overhead,
# few enough that a small grid still spreads over several workers
MEMORY_BUDGET = 512 * 2**20  # bytes of tensors one stacked group may hold in a worker

class Stacked(tuple):
    """A work item of job specs trained together on the stacked path (even a group of one)."""

    __slots__ = ()


def stack_key(spec: JobSpec) -> str | None:
    """Jobs with equal keys can share one stacked computation; None: this job runs alone."""
    m, t = spec.settings["model"], spec.settings["train"]
    if (m["kind"] != "mlp" or m["batch_norm"] or t["optimizer"] not in STACKED_OPTIMIZERS
            or t["checkpoint_every"] or t["time_limit"] or spec.time_limit or spec.checkpoint):
        return None
    return canonical({"data": spec.data_id, "split": spec.settings["data"], "hidden": m["hidden"],
                      "act": m["activation"], "slope": m["leaky_slope"], "bs": t["batch_size"],
                      "epochs": t["epochs"], "monitor": spec.monitor})


def member_bytes(spec: JobSpec, ds: Dataset) -> int:
    """A generous estimate of one member's tensors: parameters with gradients, optimizer
    moments, a best-epoch copy and momentum buffer (6 copies), its data splits, and the
    activations of one mini-batch with their gradients and masks (4 copies)."""
    features = int(np.prod(ds.X.shape[1:]))
    widths = [features, *spec.settings["model"]["hidden"], max(1, len(ds.classes))]
    params = sum((a + 1) * b for a, b in zip(widths, widths[1:]))
    bs = spec.settings["train"]["batch_size"]
    batch = len(ds.y) if bs == "full" else min(int(bs), len(ds.y))
    return 4 * (6 * params + len(ds.y) * features + 4 * batch * sum(widths))


def group_specs(specs: Sequence[JobSpec], datasets: dict[str, Dataset],
                enabled: bool = True) -> list[tuple[JobSpec, ...]]:
    """Work items over the grid's jobs in grid order: stackable jobs in groups of up to
    GROUP_SIZE (fewer when the memory estimate says so), others alone.

    Groups depend only on the grid, never on which jobs are already stored or on the worker
    count: a member's numbers depend (in the last bits) on its place in its group, so a fixed
    grouping keeps resumed and uninterrupted runs bitwise equal."""
    if not enabled:
        return [(s,) for s in specs]
    buckets: dict[str, list[JobSpec]] = {}
    items: list[tuple[JobSpec, ...]] = []
    for spec in specs:
        key = stack_key(spec)
        if key is None:
            items.append((spec,))
        else:
            buckets.setdefault(key, []).append(spec)
    for members in buckets.values():
        cap = max(1, min(GROUP_SIZE, MEMORY_BUDGET // member_bytes(members[0], datasets[members[0].data_id])))
        count = math.ceil(len(members) / cap)  # near-equal groups: 18 jobs -> 9 + 9, not 16 + 2
        cuts = [round(i * len(members) / count) for i in range(count + 1)]
        items += [Stacked(members[a:b]) for a, b in zip(cuts, cuts[1:])]
    return items


def describe(items: Sequence[tuple[JobSpec, ...]]) -> str:
    """How a run's work items train, in words: "2 stacked groups of 9 jobs, 3 jobs one at a time"."""
    sizes = sorted(len(item) for item in items if isinstance(item, Stacked))
    alone = sum(len(item) for item in items if not isinstance(item, Stacked))
    parts = []
    if sizes:
        span = str(sizes[0]) if sizes[0] == sizes[-1] else f"{sizes[0]}-{sizes[-1]}"
        parts.append(f"{len(sizes)} stacked group{'s' if len(sizes) > 1 else ''} of {span} "
                     f"job{'s' if sizes[-1] > 1 else ''}")
    if alone:
        parts.append(f"{alone} job{'s' if alone > 1 else ''} one at a time")
    return "training " + ", ".join(parts)


def _hyper(specs, name, dtype=torch.float32):
    return torch.tensor([float(s.settings["train"][name]) for s in specs], dtype=dtype)


def _column(values, like: torch.Tensor) -> torch.Tensor:
    return torch.tensor(values, dtype=like.dtype).view(-1, *([1] * (like.dim() - 1)))


def run_group(specs: Sequence[JobSpec], ds: Dataset) -> list[JobResult]:
    """Train the group; if the stacked path itself fails, fall back to one job at a time.
    A group of one still takes the stacked path, so a job's path never depends on which
    other jobs happen to be left to run."""
    try:
        return _run_group(list(specs), ds)
    except Exception:  # a problem in the shared computation must not cost the jobs
        return [run_job(s, ds) for s in specs]


_SPLIT_CACHE: OrderedDict = OrderedDict()  # recent splits of this process, read-only here
_SPLIT_CACHE_SIZE = 32
_SPLIT_CACHE_MAX_BYTES = 16 * 2**20  # datasets larger than this are split afresh each time


def _splits(specs: list[JobSpec], ds: Dataset):
    """Each member's split. Members (and later groups in the same worker) with the same
    dataset, seed and data settings share one: a grid repeats its seeds in every
    configuration, and sklearn's stratified split costs a few milliseconds."""
    out = []
    for s in specs:
        key = (ds.fingerprint, s.seed, canonical(s.settings["data"]))
        if key in _SPLIT_CACHE:
            _SPLIT_CACHE.move_to_end(key)
            out.append(_SPLIT_CACHE[key])
            continue
        sp = split_and_scale(ds, s.settings["data"], s.seed)
        if ds.X.nbytes <= _SPLIT_CACHE_MAX_BYTES:
            _SPLIT_CACHE[key] = sp
            if len(_SPLIT_CACHE) > _SPLIT_CACHE_SIZE:
                _SPLIT_CACHE.popitem(last=False)
        out.append(sp)
    return out


def _scores(logits: torch.Tensor, ys: list, ds: Dataset, splits, only: str | None = None) -> list[dict]:
    """train.score for every member at once, from logits (K, outputs, rows): the loss and
    all metrics (or just ``only``), NaN for a member whose outputs are not all finite."""
    finite = torch.isfinite(logits).flatten(1).all(dim=1).tolist()
    names = [only] if only else for_task(ds.task)
    out = []
    if ds.task == "classification":
        y = torch.from_numpy(np.stack(ys).astype(np.int64)).unsqueeze(1)
        losses = (-torch.log_softmax(logits, dim=1).gather(1, y).mean(dim=(1, 2))).tolist()
        if names == ["accuracy"]:  # the usual per-epoch case: argmax of the logits, as of the
            # probabilities (softmax keeps each row's order), counted exactly and divided in float64
            # (numpy's argmax: torch's over a middle axis is about ten times slower here)
            hits = (logits.numpy().argmax(axis=1) == y[:, 0].numpy()).sum(axis=1).tolist()
            rows = y.shape[2]
            return [{"accuracy": h / rows, "loss": v} if ok else {"accuracy": float("nan"), "loss": float("nan")}
                    for h, v, ok in zip(hits, losses, finite)]
        probs = torch.softmax(logits.double(), dim=1).transpose(1, 2).numpy()  # (K, rows, classes)
        for k, yk in enumerate(ys):
            if not finite[k]:
                out.append({**{m: float("nan") for m in names}, "loss": float("nan")})
                continue
            metrics = {m: quick(m, yk, probs[k], len(ds.classes)) for m in names}
            out.append({**metrics, "loss": losses[k]})
        return out
    raw = logits[:, 0, :].double().numpy()
    for k, (yk, sp) in enumerate(zip(ys, splits)):
        if not finite[k]:
            out.append({**{m: float("nan") for m in names}, "loss": float("nan")})
            continue
        metrics = {m: quick(m, yk, raw[k] * sp.y_std + sp.y_mean) for m in names}
        out.append({**metrics, "loss": float(np.mean(((yk - sp.y_mean) / sp.y_std - raw[k]) ** 2))})
    return out


def _stacked_inputs(arrays) -> torch.Tensor:
    return torch.stack([torch.from_numpy(np.ascontiguousarray(X.reshape(len(X), -1))) for X in arrays])


class _Dropout:
    """Each member's dropout masks, drawn from its own generator in the single-job path's
    order (input first, then each hidden layer), scaled by 1 / (1 - p)."""

    def __init__(self, specs, gens, widths):
        self.gens = [g[2] for g in gens]
        self.rates = [[s.settings["model"]["input_dropout"] for s in specs]]
        self.rates += [[s.settings["model"]["dropout"] for s in specs]] * (len(widths) - 2)
        self.widths = widths[:-1]
        self.used = any(any(r) for r in self.rates)
        self._buffers: dict[int, list] = {}  # rows -> the mask tensors, refilled each step

    def masks(self, rows: int):
        if not self.used:
            return None
        if rows not in self._buffers:
            self._buffers[rows] = [torch.ones(len(self.gens), rows, w) if any(r) else None
                                   for r, w in zip(self.rates, self.widths)]
        out = self._buffers[rows]
        for rates, mask in zip(self.rates, out):
            for k, (p, g) in enumerate(zip(rates, self.gens)):
                if p > 0:
                    mask[k].bernoulli_(1.0 - p, generator=g).div_(1.0 - p)
        return out


def _penalty_runs(strengths: list[float], net: StackedMLP) -> list[tuple]:
    """(gradient rows, weight rows, coefficient) for each contiguous run of members with a
    nonzero penalty: per-member strength times the weight mask. Members without the
    penalty are not touched (a grid's L2 factor leaves half of a group at 0)."""
    rows = [k for k, v in enumerate(strengths) if v]
    coef = _column(strengths, net.flat) * net.is_weight
    return [(net.gflat[run], net.flat[run], coef[run]) for run in member_runs(rows)]


def _run_group(specs: list[JobSpec], ds: Dataset) -> list[JobResult]:
    start = time.perf_counter()
    K = len(specs)
    env = environment()
    model_s, train0, monitor = specs[0].settings["model"], specs[0].settings["train"], specs[0].monitor
    T = [s.settings["train"] for s in specs]
    classify = ds.task == "classification"
    n_out = len(ds.classes) if classify else 1
    splits = _splits(specs, ds)
    Xtr = _stacked_inputs([sp.X_train for sp in splits])
    Xva = _stacked_inputs([sp.X_val for sp in splits])
    if classify:
        ytr = torch.stack([torch.from_numpy(sp.y_train.astype(np.int64)) for sp in splits])
    else:
        ytr = torch.stack([torch.from_numpy(((sp.y_train - sp.y_mean) / sp.y_std).astype(np.float32))
                           for sp in splits])
    loss_grad = cross_entropy_grad if classify else mse_grad
    n, features = Xtr.shape[1], Xtr.shape[2]
    gens = [streams(s.seed) for s in specs]

    # Initialized member by member with each member's own generator, in the single-job
    # path's layer order and (out, in) layout, so both paths start from the same weights.
    widths = [features, *model_s["hidden"], n_out]
    net = StackedMLP(K, widths, model_s["activation"], model_s["leaky_slope"])
    act_gain = gain(model_s["activation"], model_s["leaky_slope"])
    for i, w in enumerate(net.weights):
        for k, s in enumerate(specs):
            initialize(s.settings["model"]["init"], w[k], 1.0 if i == len(net.weights) - 1 else act_gain,
                       s.settings["model"]["init_scale"], gens[k][0])

    # Diagnostics at initialization on the probe rows (no dropout), as diagnostics.at_init.
    probe = min(diagnostics.PROBE_ROWS, n)
    _, dout = loss_grad(net.forward(Xtr[:, :probe], keep=True), ytr[:, :probe])
    net.backward(dout)
    norms = torch.stack([g.reshape(K, -1).norm(dim=1) for g in net.gw], dim=1).tolist()
    results = []
    for s, stats in zip(specs, diagnostics.init_stats([h.reshape(K, -1) for h in net.hidden], norms)):
        results.append(JobResult(key=s.key, status="done", env=env))
        results[-1].diagnostics.update(stats)

    hyper = {h: _hyper(specs, h) for h in ("momentum", "beta1", "beta2", "eps", "weight_decay")}
    opt = StackedOptimizer([t["optimizer"] for t in T], [net.flat], [net.gflat], [net.is_weight], hyper)
    l2 = [2.0 * t["l2"] for t in T]  # gradient of l2 * sum(w^2)
    l1 = [t["l1"] if t["l1_mode"] == "penalty" else 0.0 for t in T]
    prox = [t["l1"] if t["l1_mode"] == "proximal" else 0.0 for t in T]
    # penalties act on weights only: per-member strength times the weight mask, (K, P)
    l2_terms = _penalty_runs(l2, net)
    l1_terms = _penalty_runs(l1, net)
    clip = [t["clip_norm"] for t in T]
    dropout = _Dropout(specs, gens, widths)

    bs_setting = train0["batch_size"]
    bs = n if bs_setting == "full" else min(int(bs_setting), n)
    steps_per_epoch = math.ceil(n / bs)
    goal_max = METRICS[monitor][1] == "max"
    active = [True] * K
    curves = [{"train_loss": [], "val_loss": [], f"val_{monitor}": [], "lr": []} for _ in specs]
    best, best_epoch, best_state, since = [None] * K, [None] * K, [None] * K, [0] * K
    limit = None  # each member's divergence limit: diverge_factor x its first mini-batch loss
    factors = [s.settings["train"]["diverge_factor"] for s in specs]
    step = 0
    X_rows, y_rows = Xtr.view(K * n, features), ytr.view(K * n)
    offsets = (torch.arange(K) * n).unsqueeze(1)  # member k's rows start at k * n
    X_epoch, y_epoch = torch.empty_like(Xtr), torch.empty_like(ytr)
    lr_table = [[lr_at(t, steps_per_epoch, tr) for tr in T] for t in range(steps_per_epoch * train0["epochs"])]
    fault = faults.from_environment()
    for epoch in range(train0["epochs"]):
        if fault is not None:
            fault.maybe_fire(epoch)
        if not any(active):
            break
        # each member's rows in its own order for this epoch, gathered once: mini-batches are
        # then slices (K, m, features) of it
        order = (torch.stack([torch.randperm(n, generator=g[1]) for g in gens]) + offsets).view(-1)
        torch.index_select(X_rows, 0, order, out=X_epoch.view(K * n, features))
        torch.index_select(y_rows, 0, order, out=y_epoch.view(K * n))
        totals = [0.0] * K  # summed in Python floats, as the single-job path
        count = 0
        for b in range(steps_per_epoch):
            xb, yb = X_epoch[:, b * bs:(b + 1) * bs], y_epoch[:, b * bs:(b + 1) * bs]
            m = xb.shape[1]  # this mini-batch's rows per member
            lrs = lr_table[step]
            logits = net.forward(xb, dropout.masks(m), keep=True)
            values, dout = loss_grad(logits, yb)
            values = values.tolist()
            if limit is None:
                limit = [f * max(v, 1e-12) for f, v in zip(factors, values)]
            for k, (v, top) in enumerate(zip(values, limit)):
                if active[k] and (not math.isfinite(v) or v > top):  # train.py's test
                    curves[k]["train_loss"].append(v)
                    results[k].status = "diverged"
                    results[k].error = f"loss {v:.4g} at epoch {epoch + 1}, step {step + 1}"
                    results[k].epochs_run = epoch + 1
                    active[k] = False
            net.backward(dout)
            for g, w, coef in l2_terms:
                g.addcmul_(w, coef)
            for g, w, coef in l1_terms:
                g.addcmul_(torch.sign(w), coef)
            if any(clip):  # torch.nn.utils.clip_grad_norm_ per member: scale by max_norm / (norm + 1e-6), at most 1
                norm = net.gflat.norm(dim=1).tolist()
                coef = [min(c / (v + 1e-6), 1.0) if c > 0 else 1.0 for c, v in zip(clip, norm)]
                net.gflat.mul_(_column(coef, net.gflat))
            opt.step(lrs, active)
            if any(prox):  # soft-threshold the weights (biases get threshold 0: unchanged)
                thr = [r * lam if a else 0.0 for r, lam, a in zip(lrs, prox, active)]
                regularizers.soft_threshold_(net.flat, _column(thr, net.flat) * net.is_weight)
            totals = [t + v * m for t, v in zip(totals, values)]
            count += m
            step += 1
        vals = _scores(net.logits(Xva), [sp.y_val for sp in splits], ds, splits, only=monitor)
        for k, s in enumerate(specs):
            if not active[k]:
                continue
            val = vals[k]
            c = curves[k]
            c["train_loss"].append(totals[k] / count)
            c["val_loss"].append(val["loss"])
            c[f"val_{monitor}"].append(val[monitor])
            c["lr"].append(lrs[k])
            results[k].epochs_run = epoch + 1
            if not math.isfinite(val["loss"]):
                results[k].status, results[k].error = "diverged", f"validation loss {val['loss']} at epoch {epoch + 1}"
                active[k] = False
                continue
            cur = val[monitor]
            patience = s.settings["train"]["patience"]
            if best[k] is None or (cur > best[k] if goal_max else cur < best[k]):
                best[k], best_epoch[k], since[k] = cur, epoch + 1, 0
                if patience > 0:
                    best_state[k] = net.member(k)
            else:
                since[k] += 1
                if patience > 0 and since[k] >= patience:
                    active[k] = False  # stopped early: done, with its best epoch's weights
    elapsed = time.perf_counter() - start
    _finish(specs, ds, splits, net, results, curves, best_state, best_epoch, Xtr[:, :probe], elapsed)
    return results


def _finish(specs, ds, splits, net, results, curves, best_state, best_epoch, probe_x, elapsed) -> None:
    """Final metrics and diagnostics of every member that finished, on its best weights
    (early stopping) or its last, through the single-job path's functions."""
    K = len(specs)
    monitor = specs[0].monitor
    goal_max = METRICS[monitor][1] == "max"
    for k, saved in enumerate(best_state):
        if saved is not None:
            net.load_member(k, saved)  # early stopping keeps the best epoch's weights
    metrics = {}
    for split in ("train", "val", "test"):
        if getattr(splits[0], f"X_{split}") is not None:
            logits = net.logits(_stacked_inputs([getattr(sp, f"X_{split}") for sp in splits]))
            metrics[split] = _scores(logits, [getattr(sp, f"y_{split}") for sp in splits], ds, splits,
                                     only=monitor if split == "train" else None)
    net.forward(probe_x)
    ends = diagnostics.end_stats(net.hidden, specs[0].settings["model"]["activation"], K)
    for k, s in enumerate(specs):
        r = results[k]
        r.curves = curves[k]
        r.duration = elapsed / K  # the group's wall time, shared equally
        if r.status != "done":
            continue
        t = s.settings["train"]
        r.best_epoch = best_epoch[k] if t["patience"] > 0 else r.epochs_run
        for split, per_member in metrics.items():
            r.metrics[split] = {m: v for m, v in per_member[k].items() if m != "loss"}
        r.diagnostics.update(ends[k])
        r.diagnostics.update(regularizers.sparsity([w[k] for w in net.weights], t["sparsity_tol"]))
        tr, va = r.metrics["train"][monitor], r.metrics["val"][monitor]
        r.diagnostics["gap"] = (tr - va) if goal_max else (va - tr)
        r.diagnostics["stacked"] = K
