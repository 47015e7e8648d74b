"""The stacked backend of the training loop: K same-shaped MLP jobs as one computation.

On a CPU a small MLP's step is dominated by per-operation overhead, so K jobs whose tensor
shapes agree share every kernel launch: parameters get a leading member axis and layers run
as batched matrix products. Each member keeps everything that makes it its own job: its
split and scaling, initialization, mini-batch order and dropout masks from its own seed's
generators (the same draws as the single-job path), and its own learning rate, schedule,
momentum, betas, eps, weight decay, L1/L2 strength, dropout rate, clipping, patience and
divergence threshold.

The network math is in stacked_network (forward and backward written out over the member
axis) and the optimizer steps in components/stacked_optim (members of different optimizer
kinds can share a group). Members that diverge or stop early are left out of the optimizer's
steps without disturbing the others. Results agree with the single-job path to
floating-point summation order, not bit for bit (DEVELOPERS.md gives the measured
tolerance); each path on its own is bitwise reproducible.
"""

from __future__ import annotations

from collections import OrderedDict
from typing import Any

import numpy as np
import torch

from runner.components import regularizers
from runner.components.activations import gain
from runner.components.initializers import initialize
from runner.components.metrics import Task
from runner.components.optimizers import StackedOptimizer, member_column
from runner.datasets.sources import Dataset
from runner.datasets.splits import split_and_scale
from runner.recipe.grid import canonical
from runner.training import diagnostics
from runner.training.job import JobSpec
from runner.training.models import build_model
from runner.training.scoring import score_members
from runner.training.stacked_network import StackedMLP, aligned, cross_entropy_grad, mse_grad
from runner.training.streams import streams

__all__ = ["StackedBackend"]


def _hyper(specs, name, dtype=torch.float32):
    return torch.tensor([float(getattr(s.settings.train, name)) for s in specs], dtype=dtype)


_SPLIT_CACHE: OrderedDict = OrderedDict()  # recent splits of this process, read-only here
_SPLIT_CACHE_SIZE = 32
_SPLIT_CACHE_MAX_BYTES = 16 * 2**20  # datasets larger than this are split afresh each time


def _splits(specs: list[JobSpec], ds: Dataset):
    """Each member's split. Members (and later groups in the same worker) with the same
    dataset, seed and data settings share one: a grid repeats its seeds in every
    configuration, and sklearn's stratified split costs a few milliseconds."""
    out = []
    for s in specs:
        key = (ds.fingerprint, s.seed, s.fold, canonical(s.settings.data))
        if key in _SPLIT_CACHE:
            _SPLIT_CACHE.move_to_end(key)
            out.append(_SPLIT_CACHE[key])
            continue
        sp = split_and_scale(ds, s.settings.data, s.seed, s.fold)
        if ds.X.nbytes <= _SPLIT_CACHE_MAX_BYTES:
            _SPLIT_CACHE[key] = sp
            if len(_SPLIT_CACHE) > _SPLIT_CACHE_SIZE:
                _SPLIT_CACHE.popitem(last=False)
        out.append(sp)
    return out


def _stacked_inputs(arrays) -> torch.Tensor:
    """Each member's rows, flattened, in its own aligned block (stacked_network.aligned)."""
    first = arrays[0].reshape(len(arrays[0]), -1)
    out = aligned(len(arrays), first.shape, torch.from_numpy(first[:0]).dtype)
    for k, X in enumerate(arrays):
        out[k].copy_(torch.from_numpy(np.ascontiguousarray(X.reshape(len(X), -1))))
    return out


class _Dropout:
    """Each member's dropout masks, drawn from its own generator in the single-job path's
    order (input first, then each hidden layer), scaled by 1 / (1 - p)."""

    def __init__(self, specs, gens, widths):
        self.gens = [g[2] for g in gens]
        self.rates = [[s.settings.model.input_dropout for s in specs]]
        self.rates += [[s.settings.model.dropout for s in specs]] * (len(widths) - 2)
        self.widths = widths[:-1]
        self.used = any(any(r) for r in self.rates)
        self._buffers: dict[int, list] = {}  # rows -> the mask tensors, refilled each step

    def masks(self, rows: int):
        if not self.used:
            return None
        if rows not in self._buffers:
            self._buffers[rows] = [
                torch.ones(len(self.gens), rows, w) if any(r) else None for r, w in zip(self.rates, self.widths)
            ]
        out = self._buffers[rows]
        for rates, mask in zip(self.rates, out):
            for k, (p, g) in enumerate(zip(rates, self.gens)):
                if p > 0:
                    mask[k].bernoulli_(1.0 - p, generator=g).div_(1.0 - p)
        return out


class StackedBackend:
    """K members of one stack key (grouping.stack_key): shared shapes, their own everything else."""

    stacked = True

    def __init__(self, specs: list[JobSpec], ds: Dataset):
        self.specs, self.ds = specs, ds
        self.members = K = len(specs)
        model_s = specs[0].settings.model
        T = [s.settings.train for s in specs]
        self.trains = T
        self.classify = ds.task is Task.CLASSIFICATION
        self.splits = splits = _splits(specs, ds)
        self.Xtr = _stacked_inputs([sp.X_train for sp in splits])
        self.Xva = _stacked_inputs([sp.X_val for sp in splits])
        if self.classify:
            self.ytr = torch.stack([torch.from_numpy(sp.y_train.astype(np.int64)) for sp in splits])
        else:
            self.ytr = torch.stack(
                [torch.from_numpy(((sp.y_train - sp.y_mean) / sp.y_std).astype(np.float32)) for sp in splits]
            )
        self.loss_grad = cross_entropy_grad if self.classify else mse_grad
        self.n, features = n, _ = self.Xtr.shape[1], self.Xtr.shape[2]
        self.gens = gens = [streams(s.seed) for s in specs]
        n_out = len(ds.classes) if self.classify else 1
        # Initialized member by member with each member's own generator, in the single-job
        # path's layer order and (out, in) layout, so both paths start from the same weights.
        self.widths = widths = [features, *model_s.hidden, n_out]
        self.net = net = StackedMLP(K, widths, model_s.activation, model_s.leaky_slope, batch_norm=model_s.batch_norm)
        act_gain = gain(model_s.activation, model_s.leaky_slope)
        for i, w in enumerate(net.weights):
            for k, s in enumerate(specs):
                initialize(
                    s.settings.model.init,
                    w[k],
                    1.0 if i == len(net.weights) - 1 else act_gain,
                    s.settings.model.init_scale,
                    gens[k][0],
                )
        self.probe = min(diagnostics.PROBE_ROWS, n)
        hyper = {h: _hyper(specs, h) for h in ("momentum", "beta1", "beta2", "alpha", "eps", "weight_decay")}
        self.opt = StackedOptimizer([t.optimizer for t in T], [net.flat], [net.gflat], [net.is_weight], hyper)
        self.penalties = regularizers.StackedPenalties(T, net.flat, net.gflat, net.is_weight)
        self.clip = [t.clip_norm for t in T]
        self.dropout = _Dropout(specs, gens, widths)
        self.batch = T[0].batch_rows(n)
        self.steps_per_epoch = -(-n // self.batch)
        self.X_epoch, self.y_epoch = aligned(K, (n, features)), torch.empty_like(self.ytr)
        self._dout: torch.Tensor | None = None
        self._state_names: dict = {}  # model settings -> the single network's state_dict names
        self.steps = 0  # training steps taken by the group
        self._steps_at: dict[int, int] = {}  # member -> steps at its last snapshot
        self._restored: dict[int, int] = {}  # member -> steps at the snapshot it was restored to

    def split_records(self) -> list[dict[str, Any]]:
        return [sp.rows.record() for sp in self.splits]

    def initial_diagnostics(self) -> list[dict[str, Any]]:
        """As diagnostics.at_init, on the probe rows (no dropout). The gradient at each
        hidden activation is read as the backward pass hands it to that activation's
        derivative (which then overwrites it in place)."""
        net, K, probe = self.net, self.members, self.probe
        x = self.Xtr[:, :probe]
        _, dout = self.loss_grad(net.forward(x, keep=True), self.ytr[:, :probe])
        back: list[torch.Tensor] = []
        derivative = net.act_back

        def measured(g, z, a, out):
            back.append(g.reshape(K, -1).norm(dim=1))
            return derivative(g, z, a, out)

        net.act_back = measured
        try:
            net.backward(dout)
        finally:
            net.act_back = derivative
        back.reverse()  # met last layer first
        norms = torch.stack([g.reshape(K, -1).norm(dim=1) for g in net.gw], dim=1).tolist()
        weights = torch.stack([w.reshape(K, -1).norm(dim=1) for w in net.weights], dim=1).tolist()
        return diagnostics.init_stats(
            [h.reshape(K, -1) for h in net.hidden],
            norms,
            x.reshape(K, -1),
            backprop=torch.stack(back, dim=1).tolist() if back else [[] for _ in range(K)],
            weight_norms=weights,
        )

    def begin_epoch(self) -> None:
        """Each member's rows in its own order for this epoch, gathered once: mini-batches
        are then slices (K, m, features) of it."""
        for k, g in enumerate(self.gens):
            order = torch.randperm(self.n, generator=g[1])
            torch.index_select(self.Xtr[k], 0, order, out=self.X_epoch[k])
            torch.index_select(self.ytr[k], 0, order, out=self.y_epoch[k])

    def losses(self, step: int) -> tuple[list[float], int]:
        bs = self.batch
        xb, yb = self.X_epoch[:, step * bs : (step + 1) * bs], self.y_epoch[:, step * bs : (step + 1) * bs]
        m = xb.shape[1]  # this mini-batch's rows per member
        logits = self.net.forward(xb, self.dropout.masks(m), keep=True, train=True)
        values, self._dout = self.loss_grad(logits, yb)
        self.steps += 1  # batch norm's num_batches_tracked, as the single network counts it
        return values.tolist(), m

    def update(self, lrs: list[float], active: list[bool]) -> None:
        net = self.net
        net.backward(self._dout)
        self.penalties.add_gradients()
        if any(self.clip):  # torch.nn.utils.clip_grad_norm_ per member: scale by max_norm / (norm + 1e-6), at most 1
            norm = net.gflat.norm(dim=1).tolist()
            coef = [min(c / (v + 1e-6), 1.0) if c > 0 else 1.0 for c, v in zip(self.clip, norm)]
            net.gflat.mul_(member_column(coef, net.gflat))
        self.opt.step(lrs, active)
        self.penalties.proximal_step(lrs, active)

    def validate(self) -> list[dict[str, float]]:
        splits = self.splits
        return score_members(
            self.net.logits(self.Xva), [sp.y_val for sp in splits], self.ds, splits, only=self.specs[0].monitor
        )

    def snapshot(self, k: int) -> torch.Tensor:
        self._steps_at[k] = self.steps
        return self.net.member(k)

    def restore(self, k: int, state: torch.Tensor) -> None:
        self.net.load_member(k, state)
        self._restored[k] = self._steps_at[k]

    def final_metrics(self) -> list[dict[str, dict[str, float]]]:
        splits = self.splits
        out: list[dict[str, dict[str, float]]] = [{} for _ in self.specs]
        for split in ("train", "val", "test"):
            if getattr(splits[0], f"X_{split}") is None:
                continue
            logits = self.net.logits(_stacked_inputs([getattr(sp, f"X_{split}") for sp in splits]))
            scores = score_members(logits, [getattr(sp, f"y_{split}") for sp in splits], self.ds, splits)
            for k, per_member in enumerate(scores):
                out[k][split] = {m: v for m, v in per_member.items() if m != "loss"}
        return out

    def end_diagnostics(self) -> list[dict[str, Any]]:
        net, K = self.net, self.members
        net.forward(self.Xtr[:, : self.probe])
        ends = diagnostics.end_stats(net.hidden, self.specs[0].settings.model.activation, K)
        classes = len(self.ds.classes) if self.classify else None
        return [
            {
                **ends[k],
                **regularizers.sparsity([w[k] for w in net.weights], t.sparsity_tol),
                **diagnostics.scales(sp, classes),
                "stacked": K,
            }
            for k, (t, sp) in enumerate(zip(self.trains, self.splits))
        ]

    def member_state(self, k: int) -> dict[str, np.ndarray]:
        """Member k's layers under the names the single-job network gives them (its
        nn.Linear layers in order, weight then bias; the same (out, in) layout)."""
        model_s = self.specs[k].settings.model  # members' dropout rates (and so layer indices) may differ
        if model_s not in self._state_names:
            g = torch.Generator()
            skeleton = build_model(model_s, (self.widths[0],), self.widths[-1], g, g)
            self._state_names[model_s] = list(skeleton.state_dict())
        names = self._state_names[model_s]
        net = self.net
        tensors = []
        for i, (w, b) in enumerate(zip(net.weights, net.biases)):
            tensors += [w[k], b[k]]
            if i < len(net.norms):  # nn.BatchNorm1d's weight, bias, running_mean, running_var, num_batches_tracked
                n = net.norms[i]
                seen = self._restored.get(k, self.steps)
                tensors += [n.gamma[k].reshape(-1), n.beta[k].reshape(-1), n.running_mean[k], n.running_var[k]]
                tensors.append(torch.tensor(seen, dtype=torch.int64))
        if len(tensors) != len(names):
            raise RuntimeError(f"stacked layers {len(tensors)} do not match the network's {names}")
        return {name: t.numpy().copy() for name, t in zip(names, tensors)}

    def checkpoint_state(self) -> dict[str, Any]:
        raise NotImplementedError("stacked groups take no mid-job checkpoints (grouping.stack_key)")

    def load_checkpoint_state(self, saved: dict[str, Any]) -> None:
        raise NotImplementedError("stacked groups take no mid-job checkpoints (grouping.stack_key)")
