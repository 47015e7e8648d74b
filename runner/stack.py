"""Stacked execution: train K same-shaped MLP jobs as one computation.

On a CPU a small MLP's step is dominated by per-operation overhead, so K jobs whose tensor
shapes agree share every kernel launch: parameters get a leading member axis and layers run
as batched matrix products (torch.baddbmm). Each member keeps everything that makes it its
own job: its split and scaling, initialization, mini-batch order and dropout masks from its
own seed's generators (the same draws as the single-job path), and its own learning rate,
schedule, momentum, betas, eps, weight decay, L1/L2 strength, dropout rate, clipping,
patience and divergence threshold, held as per-member tensors.

Members that diverge or stop early are masked out (their learning rate becomes 0) without
disturbing the others. Final metrics and diagnostics are taken on each member rebuilt as an
ordinary network, through the same code as the single-job path. Results agree with the
single-job path to floating-point summation order, not bit for bit (see DEVELOPERS.md for
the measured tolerance); each path on its own is bitwise reproducible.

Group size is bounded by ``GROUP_SIZE`` and by an estimate of the group's memory
(``member_bytes``) against ``MEMORY_BUDGET`` per worker process.
"""
from __future__ import annotations

import math
import time
import warnings
from typing import Sequence

import numpy as np
import torch
import torch.nn.functional as F

from . import diagnostics, faults, regularizers
from .activations import gain, make_activation
from .data import Dataset, split_and_scale
from .grid import canonical
from .initializers import initialize
from .metrics import METRICS
from .models import build_model, layers_with_weights, weight_tensors
from .schedules import lr_at
from .stacked_optim import STACKED_OPTIMIZERS, StackedOptimizer
from .train import JobResult, JobSpec, environment, run_job, score, streams

__all__ = ["Stacked", "stack_key", "group_specs", "run_group", "member_bytes", "GROUP_SIZE", "MEMORY_BUDGET"]

GROUP_SIZE = 16  # members per stacked group: enough to share the per-operation overhead,
# few enough that a small grid still spreads over several workers
MEMORY_BUDGET = 512 * 2**20  # bytes of tensors one stacked group may hold in a worker

# Parameters are strided views into one (K, P) buffer, which torch notes once per backward.
warnings.filterwarnings("ignore", message="grad and param do not obey the gradient layout contract")


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
                      "act": m["activation"], "slope": m["leaky_slope"], "opt": t["optimizer"],
                      "bs": t["batch_size"], "epochs": t["epochs"], "monitor": spec.monitor})


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
        items += [Stacked(members[i:i + cap]) for i in range(0, len(members), cap)]
    return items


def _member_net(spec: JobSpec, in_shape, n_out, weights, biases):
    """Member k rebuilt as the ordinary network of the single-job path."""
    throwaway = torch.Generator().manual_seed(0)
    shape_only = {**spec.settings["model"], "init": "zeros"}  # weights are copied in below
    net = build_model(shape_only, in_shape, n_out, throwaway, throwaway)
    with torch.no_grad():
        for layer, w, b in zip(layers_with_weights(net), weights, biases):
            layer.weight.copy_(w.T)
            layer.bias.copy_(b.reshape(-1))
    return net


def _hyper(specs, name, dtype=torch.float32):
    return torch.tensor([float(s.settings["train"][name]) for s in specs], dtype=dtype)


def run_group(specs: Sequence[JobSpec], ds: Dataset) -> list[JobResult]:
    """Train the group; if the stacked path itself fails, fall back to one job at a time.
    A group of one still takes the stacked path, so a job's path never depends on which
    other jobs happen to be left to run."""
    try:
        return _run_group(list(specs), ds)
    except Exception:  # a problem in the shared computation must not cost the jobs
        return [run_job(s, ds) for s in specs]


def _run_group(specs: list[JobSpec], ds: Dataset) -> list[JobResult]:
    start = time.perf_counter()
    K = len(specs)
    env = environment()
    first = specs[0].settings
    model_s, train0, monitor = first["model"], first["train"], specs[0].monitor
    classify = ds.task == "classification"
    n_out = len(ds.classes) if classify else 1
    splits, cache = [], {}
    for s in specs:  # members with the same seed and data settings share one split
        key = (s.seed, canonical(s.settings["data"]))
        if key not in cache:
            cache[key] = split_and_scale(ds, s.settings["data"], s.seed)
        splits.append(cache[key])
    flat = lambda X: torch.from_numpy(np.ascontiguousarray(X.reshape(len(X), -1)))  # noqa: E731
    Xtr = torch.stack([flat(sp.X_train) for sp in splits])
    Xva = torch.stack([flat(sp.X_val) for sp in splits])
    if classify:
        ytr = torch.stack([torch.from_numpy(sp.y_train.astype(np.int64)) for sp in splits])
    else:
        ytr = torch.stack([torch.from_numpy(((sp.y_train - sp.y_mean) / sp.y_std).astype(np.float32))
                           for sp in splits])
    in_shape = tuple(splits[0].X_train.shape[1:])
    n, features = Xtr.shape[1], Xtr.shape[2]
    gens = [streams(s.seed) for s in specs]

    # Parameters, initialized member by member with each member's own generator, in the
    # single-job path's order and (out, in) layout, then stored as (K, in, out). All of a
    # member's parameters live in one row of a (K, P) buffer, and their gradients in one row
    # of another, so the optimizer, clipping and penalties are a few operations per step.
    widths = [features, *model_s["hidden"], n_out]
    act_gain = gain(model_s["activation"], model_s["leaky_slope"])
    shapes = list(zip(widths, widths[1:]))
    P = sum(a * b + b for a, b in shapes)
    flat, gflat = torch.zeros(K, P), torch.zeros(K, P)
    is_weight = torch.zeros(P)
    W, B = [], []
    offset = 0
    for i, (a, b) in enumerate(shapes):
        last = i == len(shapes) - 1
        w_view = flat[:, offset:offset + a * b].view(K, a, b)
        for k, s in enumerate(specs):
            w = torch.empty(b, a)
            initialize(s.settings["model"]["init"], w, 1.0 if last else act_gain,
                       s.settings["model"]["init_scale"], gens[k][0])
            w_view[k] = w.T
        is_weight[offset:offset + a * b] = 1.0
        w_leaf = w_view.detach().requires_grad_()
        w_leaf.grad = gflat[:, offset:offset + a * b].view(K, a, b)
        offset += a * b
        b_leaf = flat[:, offset:offset + b].view(K, 1, b).detach().requires_grad_()
        b_leaf.grad = gflat[:, offset:offset + b].view(K, 1, b)
        offset += b
        W.append(w_leaf)
        B.append(b_leaf)
    flat.grad = gflat
    hyper = {h: _hyper(specs, h) for h in ("momentum", "beta1", "beta2", "eps", "weight_decay")}
    opt = StackedOptimizer(train0["optimizer"], [flat], [is_weight], hyper)
    l2 = _hyper(specs, "l2")
    l1 = _hyper(specs, "l1")
    l1_pen = torch.where(torch.tensor([s.settings["train"]["l1_mode"] == "penalty" for s in specs]), l1, 0.0)
    l1_prox = l1 - l1_pen
    clip = _hyper(specs, "clip_norm")
    p_drop = [s.settings["model"]["dropout"] for s in specs]
    p_in = [s.settings["model"]["input_dropout"] for s in specs]
    act = make_activation(model_s["activation"], model_s["leaky_slope"])
    train_mask = is_weight.bool()

    def flat_w(_W):
        """The weight entries of every member, (K, number of weights), differentiable."""
        return torch.cat([w.reshape(K, -1) for w in _W], dim=1)

    def members(k):
        return [w[k].detach() for w in W], [b[k].detach() for b in B]

    probe = slice(0, min(diagnostics.PROBE_ROWS, n))
    results = []
    for k, s in enumerate(specs):
        r = JobResult(key=s.key, status="done", env=env)
        net = _member_net(s, in_shape, n_out, *members(k))
        xb = Xtr[k][probe].reshape(-1, *in_shape)
        loss_fn = (lambda out, y: F.cross_entropy(out, y)) if classify else \
            (lambda out, y: F.mse_loss(out.squeeze(1), y))
        r.diagnostics.update(diagnostics.at_init(net, xb, ytr[k][probe], loss_fn))
        results.append(r)

    def dropout(h, rates, k_gens):
        if not any(rates):
            return h
        masks, scale = [], []
        for k, p in enumerate(rates):
            if p > 0:
                masks.append(torch.empty(h.shape[1:]).bernoulli_(1.0 - p, generator=k_gens[k][2]))
            else:
                masks.append(torch.ones(h.shape[1:]))
            scale.append(1.0 - p if p > 0 else 1.0)
        return h * torch.stack(masks) / torch.tensor(scale).view(-1, 1, 1)

    def forward(x, train_mode):
        h = dropout(x, p_in, gens) if train_mode else x
        for i in range(len(W) - 1):
            h = act(torch.baddbmm(B[i], h, W[i]))
            if train_mode:
                h = dropout(h, p_drop, gens)
        return torch.baddbmm(B[-1], h, W[-1])

    bs_setting = train0["batch_size"]
    bs = n if bs_setting == "full" else min(int(bs_setting), n)
    steps_per_epoch = math.ceil(n / bs)
    goal_max = METRICS[monitor][1] == "max"
    active = torch.ones(K, dtype=torch.bool)
    curves = [{"train_loss": [], "val_loss": [], f"val_{monitor}": [], "lr": []} for _ in specs]
    best = [None] * K
    best_epoch = [None] * K
    best_state = [None] * K
    since = [0] * K
    first = None  # each member's first mini-batch loss, the divergence reference
    limits = _hyper(specs, "diverge_factor")
    step = 0
    rows = torch.arange(K).unsqueeze(1)
    total_steps = steps_per_epoch * train0["epochs"]
    lr_table = torch.tensor([[lr_at(t, steps_per_epoch, s.settings["train"]) for s in specs]
                             for t in range(total_steps)])
    fault = faults.from_environment()
    for epoch in range(train0["epochs"]):
        if fault is not None:
            fault.maybe_fire(epoch)
        if not bool(active.any()):
            break
        orders = torch.stack([torch.randperm(n, generator=g[1]) for g in gens])
        totals = torch.zeros(K, dtype=torch.float64)
        count = 0
        for b in range(steps_per_epoch):
            idx = orders[:, b * bs:(b + 1) * bs]
            lrs = lr_table[step]
            out = forward(Xtr[rows, idx], True)
            yb = ytr[rows, idx]
            if classify:
                per = F.cross_entropy(out.reshape(-1, n_out), yb.reshape(-1), reduction="none").view(K, -1).mean(1)
            else:
                per = ((out.squeeze(-1) - yb) ** 2).mean(1)
            values = per.detach()
            if first is None:
                first = values.clone()
            bad = active & (~torch.isfinite(values) | (values > limits * torch.clamp(first, min=1e-12)))
            for k in torch.nonzero(bad).flatten().tolist():
                v = float(values[k])
                curves[k]["train_loss"].append(v)
                results[k].status = "diverged"
                results[k].error = f"loss {v:.4g} at epoch {epoch + 1}, step {step + 1}"
                results[k].epochs_run = epoch + 1
                active[k] = False
            total = per
            if bool((l2 > 0).any()):
                total = total + l2 * (flat_w(W) ** 2).sum(1)
            if bool((l1_pen > 0).any()):
                total = total + l1_pen * flat_w(W).abs().sum(1)
            gflat.zero_()
            torch.where(active, total, torch.zeros_like(total)).sum().backward()
            with torch.no_grad():
                if not bool(active.all()):
                    gflat[~active] = 0.0
                if bool((clip > 0).any()):
                    # torch.nn.utils.clip_grad_norm_ per member: scale by max_norm / (norm + 1e-6), at most 1
                    coef = torch.clamp(clip / (gflat.norm(dim=1) + 1e-6), max=1.0)
                    gflat.mul_(torch.where(clip > 0, coef, torch.ones_like(coef)).unsqueeze(1))
            opt.step(lrs, active)
            if bool((l1_prox > 0).any()):
                with torch.no_grad():
                    thr = torch.where(active, lrs * l1_prox, torch.zeros_like(lrs)).unsqueeze(1)
                    shrunk = torch.sign(flat) * (flat.abs() - thr).clamp_(min=0.0)
                    flat.copy_(torch.where(train_mask, shrunk, flat))  # weights only, never biases
            totals += torch.where(active, values.double(), torch.zeros_like(totals)) * idx.shape[1]
            count += idx.shape[1]
            step += 1
        with torch.no_grad():
            val_out = forward(Xva, False)
        for k, s in enumerate(specs):
            if not active[k]:
                continue
            val = score(val_out[k], splits[k].y_val, ds, splits[k], only=monitor)
            c = curves[k]
            c["train_loss"].append(float(totals[k] / count))
            c["val_loss"].append(val["loss"])
            c[f"val_{monitor}"].append(val[monitor])
            c["lr"].append(float(lrs[k]))
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
                    best_state[k] = members(k)
                    best_state[k] = ([w.clone() for w in best_state[k][0]], [b.clone() for b in best_state[k][1]])
            else:
                since[k] += 1
                if patience > 0 and since[k] >= patience:
                    active[k] = False  # stopped early: done, with its best epoch's weights
    elapsed = time.perf_counter() - start
    for k, s in enumerate(specs):
        r = results[k]
        r.curves = curves[k]
        r.duration = elapsed / K  # the group's wall time, shared equally
        if r.status != "done":
            continue
        t = s.settings["train"]
        weights, biases = best_state[k] if best_state[k] is not None else members(k)
        net = _member_net(s, in_shape, n_out, weights, biases)
        r.best_epoch = best_epoch[k] if t["patience"] > 0 else r.epochs_run
        sp = splits[k]
        net.eval()
        for split, X, y in (("train", sp.X_train, sp.y_train), ("val", sp.X_val, sp.y_val),
                            ("test", sp.X_test, sp.y_test)):
            if X is not None:
                with torch.no_grad():
                    out = score(net(torch.from_numpy(np.ascontiguousarray(X))), y, ds, sp,
                                only=monitor if split == "train" else None)
                out.pop("loss")
                r.metrics[split] = out
        xb = torch.from_numpy(np.ascontiguousarray(sp.X_train[probe]))
        r.diagnostics.update(diagnostics.at_end(net, xb, s.settings["model"]["activation"]))
        r.diagnostics.update(regularizers.sparsity(weight_tensors(net), t["sparsity_tol"]))
        tr, va = r.metrics["train"][monitor], r.metrics["val"][monitor]
        r.diagnostics["gap"] = (tr - va) if goal_max else (va - tr)
        r.diagnostics["stacked"] = K
    return results
