"""The third backend of the training loop: K jobs of one user network (``model.kind =
"python"``, same file, class and arguments) as one computation, through torch.func.

Each member is built exactly as on the single path (user_module.build_user_model, from its
own seed's streams); ``torch.func.stack_module_state`` then gives every parameter and
buffer a leading member axis, and ``torch.func.functional_call`` under ``torch.func.vmap``
runs the network once for all members. Only the forward pass is vmapped: the members'
losses are summed and ordinary autograd differentiates the sum, which gives each member its
own gradient (the members share nothing), and torch.func's ``grad`` transform is not needed
(its first use imports torch's compiler front end, seconds per worker process).

Dropout: on the single path each nn.Dropout of the network (made the tool's Dropout) draws
its mask from the member's dropout stream when it is called. Under vmap a module cannot draw
from a per-member generator, so the masks are drawn before the step, member by member from
the same streams in the same order (the shapes of each call come from one recording pass),
and the network's dropout modules multiply by them. A network that draws other random
numbers in ``forward`` fails here (vmap's randomness="error"), and the loop then trains its
jobs one at a time and says so.

The rest is the stacked path's: per-member learning rates and optimizer steps
(components.optimizers.StackedOptimizer: sgd, momentum, nesterov, adam, adamw), L1/L2 on the
Linear/Conv weights, per-member gradient clipping, early stopping by member snapshots.
Results agree with the single path to float32 summation order, not bit for bit.
"""

from __future__ import annotations

import copy
import math
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn
from torch.func import functional_call, stack_module_state, vmap

from runner.components import regularizers
from runner.components.metrics import Task
from runner.components.optimizers import StackedOptimizer, member_column
from runner.datasets.sources import Dataset
from runner.datasets.splits import split_and_scale
from runner.training import diagnostics
from runner.training.job import JobSpec
from runner.training.models import WEIGHTED, Dropout, build_model
from runner.training.scoring import score_members
from runner.training.streams import streams

__all__ = ["ModuleStackBackend", "network_counts"]


class _Masks:
    """The masks of one step, handed to the network's dropout calls in call order; or, while
    ``shapes`` is a list, the shapes of those calls recorded instead."""

    def __init__(self):
        self.pending: list[torch.Tensor] = []
        self.shapes: list[tuple[tuple[int, ...], float]] | None = None

    def apply(self, x: torch.Tensor, p: float) -> torch.Tensor:
        if self.shapes is not None:
            self.shapes.append((tuple(x.shape), p))
            return x
        keep = self.pending.pop(0)
        return x * keep / (1.0 - p)  # as runner.training.models.Dropout


class _MaskedDropout(nn.Module):
    def __init__(self, p: float, masks: _Masks):
        super().__init__()
        self.p, self.masks = p, masks

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        if not self.training or self.p == 0:
            return x
        return self.masks.apply(x, self.p)


def _batch_norm_step(net: nn.Module, width: int = 16) -> int:
    """Group sizes the backend pads to: a multiple of this many members. Under vmap a batch
    norm of C channels runs over K x C channels at once, and its vectorized loops end in a
    tail whose other rounding falls on whichever member's channels end the run (a CNN with
    4 channels: a member's statistics differed in a group of 3, not of 2 or 4). With K x C a
    multiple of ``width`` floats (the widest vector, AVX-512's 16) no member is in a tail."""
    step = 1
    for m in net.modules():
        if isinstance(m, nn.modules.batchnorm._BatchNorm):
            c = width // math.gcd(width, m.num_features)
            step = step * c // math.gcd(step, c)
    return step


def _weight_names(net: nn.Module) -> list[str]:
    """Parameter names of the Linear/Conv weights (what penalties and weight decay act on)."""
    return [f"{name}.weight" if name else "weight" for name, m in net.named_modules() if isinstance(m, WEIGHTED)]


class ModuleStackBackend:
    """K members of one user network (grouping.stack_key): shared architecture and data,
    their own seeds, initializers and training settings."""

    stacked = True

    def __init__(self, specs: list[JobSpec], ds: Dataset):
        self.specs, self.ds = specs, ds
        self.members = len(specs)
        self.trains = T = [s.settings.train for s in specs]
        self.classify = ds.task is Task.CLASSIFICATION
        self.splits = [split_and_scale(ds, s.settings.data, s.seed, s.fold) for s in specs]
        self.Xtr = torch.stack([torch.from_numpy(np.ascontiguousarray(sp.X_train)) for sp in self.splits])
        self.ytr = torch.stack([self._targets(sp.y_train, sp) for sp in self.splits])
        self.n = n = self.Xtr.shape[1]
        self.gens = [streams(s.seed) for s in specs]
        n_out = len(ds.classes) if self.classify else 1
        in_shape = tuple(self.Xtr.shape[2:])
        self.nets = [
            build_model(s.settings.model, in_shape, n_out, g[0], g[2], s.module) for s, g in zip(specs, self.gens)
        ]
        self.probe = min(diagnostics.PROBE_ROWS, n)
        self.base = copy.deepcopy(self.nets[0])
        self.masks = _Masks()
        self.pad_to = _batch_norm_step(self.base)
        for parent in list(self.base.modules()):
            for name, child in list(parent.named_children()):
                if isinstance(child, Dropout):
                    setattr(parent, name, _MaskedDropout(child.p, self.masks))
        params, self.buffers = stack_module_state(self.nets)
        self.names = list(params)
        self.params = [params[name].detach().requires_grad_() for name in self.names]
        self.grads = [torch.zeros_like(p) for p in self.params]
        weights = set(_weight_names(self.base))
        self.is_weight = [name in weights for name in self.names]
        hyper = {h: torch.tensor([float(getattr(t, h)) for t in T]) for h in ("momentum", "beta1", "beta2", "eps")}
        hyper["weight_decay"] = torch.tensor([float(t.weight_decay) for t in T])
        self.opt = StackedOptimizer([t.optimizer for t in T], self.params, self.grads, self.is_weight, hyper)
        self.l2 = torch.tensor([t.l2 for t in T]) if any(t.l2 for t in T) else None
        self.l1 = torch.tensor([t.penalty_l1 for t in T]) if any(t.penalty_l1 for t in T) else None
        self.batch = T[0].batch_rows(n)
        self.steps_per_epoch = -(-n // self.batch)
        self._shapes: dict[int, list] = {}  # rows -> each dropout call's (shape, p)
        self._mask_buffers: dict[int, list[torch.Tensor]] = {}
        self.X_epoch, self.y_epoch = torch.empty_like(self.Xtr), torch.empty_like(self.ytr)
        self._total: torch.Tensor | None = None

    def _targets(self, y: np.ndarray, sp) -> torch.Tensor:
        if self.classify:
            return torch.from_numpy(y.astype(np.int64))
        return torch.from_numpy(((y - sp.y_mean) / sp.y_std).astype(np.float32))

    def _forward(self, X: torch.Tensor, masks: list[torch.Tensor]) -> torch.Tensor:
        """All members' outputs (K, rows, outputs) for their rows X (K, rows, ...).

        The group is padded with copies of its first member so that a member's numbers do
        not depend on the group (tests/test_grouping.py): a group of one runs as two, since
        vmap over a single member batches a convolution through other kernels (outputs 2e-7
        apart on a small CNN); with batch norm the group is padded to ``pad_to`` members (see
        ``_batch_norm_step``). Only the real members' outputs are used, so the copies add
        exact zeros to the gradients; batch-norm statistics are kept for the real members."""
        params = dict(zip(self.names, self.params))
        buffers = self.buffers
        K = self.members
        pad = (-K) % self.pad_to or (1 if K == 1 else 0)

        def padded(t):
            return torch.cat([t, t[:1].expand(pad, *t.shape[1:])])

        if pad:
            params = {name: padded(p) for name, p in params.items()}
            buffers = {name: padded(b) for name, b in buffers.items()}
            X, masks = padded(X), [padded(m) for m in masks]

        def one(p, b, x, m):
            self.masks.pending = list(m)
            return functional_call(self.base, (p, b), (x,))

        try:
            out = vmap(one, randomness="error")(params, buffers, X, masks)
        except RuntimeError as exc:
            if "random" not in str(exc):
                raise
            raise RuntimeError(
                "the network draws random numbers in forward (other than through nn.Dropout), which "
                "cannot come from each member's own seed here"
            ) from None
        if pad:
            with torch.no_grad():
                for name, b in self.buffers.items():
                    b.copy_(buffers[name][:K])
            out = out[:K]
        return out

    def _losses(self, out: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
        """Each member's mean loss (K,), as the single path's cross-entropy or MSE."""
        K, m = out.shape[0], out.shape[1]
        if self.classify:
            return F.cross_entropy(out.reshape(K * m, -1), y.reshape(K * m), reduction="none").view(K, m).mean(1)
        return (out[..., 0] - y).square().mean(1)

    def _step_masks(self, rows: int) -> list[torch.Tensor]:
        """This step's dropout masks, (K, *shape) per dropout call, each member's from its
        own dropout stream in its network's call order."""
        if rows not in self._shapes:
            self.masks.shapes = []
            with torch.no_grad():
                self.base(torch.zeros(rows, *self.Xtr.shape[2:]))
            self._shapes[rows], self.masks.shapes = self.masks.shapes, None
            self._mask_buffers[rows] = [torch.empty(self.members, *shape) for shape, _ in self._shapes[rows]]
        buffers = self._mask_buffers[rows]
        for (_, p), buf in zip(self._shapes[rows], buffers):
            for k, gens in enumerate(self.gens):
                buf[k].bernoulli_(1.0 - p, generator=gens[2])
        return buffers

    def split_records(self) -> list[dict[str, Any]]:
        return [sp.rows.record() for sp in self.splits]

    def initial_diagnostics(self) -> list[dict[str, Any]]:
        """Each member's own network, as on the single path (eval mode: no random draw)."""
        loss_fn = (
            (lambda out, y: F.cross_entropy(out, y))
            if self.classify
            else (lambda out, y: F.mse_loss(out.squeeze(1), y))
        )
        return [
            diagnostics.at_init(net, self.Xtr[k, : self.probe], self.ytr[k, : self.probe], loss_fn)
            for k, net in enumerate(self.nets)
        ]

    def begin_epoch(self) -> None:
        self.base.train()
        for k, gens in enumerate(self.gens):
            order = torch.randperm(self.n, generator=gens[1])
            torch.index_select(self.Xtr[k], 0, order, out=self.X_epoch[k])
            torch.index_select(self.ytr[k], 0, order, out=self.y_epoch[k])

    def losses(self, step: int) -> tuple[list[float], int]:
        bs = self.batch
        xb, yb = self.X_epoch[:, step * bs : (step + 1) * bs], self.y_epoch[:, step * bs : (step + 1) * bs]
        m = xb.shape[1]
        masks = self._step_masks(m)
        values = self._losses(self._forward(xb, masks), yb)
        self._total = values.sum() + self._penalty()
        return values.tolist(), m

    def _penalty(self) -> torch.Tensor | float:
        """Each member's L2 and L1 (penalty mode) on its Linear/Conv weights, summed."""
        total: torch.Tensor | float = 0.0
        weights = [p for p, w in zip(self.params, self.is_weight) if w]
        if self.l2 is not None:
            total = total + (self.l2 * sum(w.square().flatten(1).sum(1) for w in weights)).sum()
        if self.l1 is not None:
            total = total + (self.l1 * sum(w.abs().flatten(1).sum(1) for w in weights)).sum()
        return total

    def update(self, lrs: list[float], active: list[bool]) -> None:
        grads = torch.autograd.grad(self._total, self.params, allow_unused=True)
        with torch.no_grad():
            for buf, g in zip(self.grads, grads):
                buf.copy_(g) if g is not None else buf.zero_()  # a parameter forward never uses
            clip = [t.clip_norm for t in self.trains]
            if any(clip):  # torch.nn.utils.clip_grad_norm_ per member
                norm = torch.stack([g.flatten(1).norm(dim=1) for g in self.grads]).norm(dim=0).tolist()
                coef = [min(c / (v + 1e-6), 1.0) if c > 0 else 1.0 for c, v in zip(clip, norm)]
                for g in self.grads:
                    g.mul_(member_column(coef, g))
            self.opt.step(lrs, active)
            prox = [t.proximal_l1 * r if a else 0.0 for t, r, a in zip(self.trains, lrs, active)]
            if any(prox):
                for p, w in zip(self.params, self.is_weight):
                    if w:
                        regularizers.soft_threshold_(p, member_column(prox, p))

    @torch.no_grad()
    def _outputs(self, X: torch.Tensor) -> torch.Tensor:
        """Eval-mode logits (K, outputs, rows), as score_members takes them."""
        self.base.eval()
        try:
            return self._forward(X, []).transpose(1, 2).contiguous()
        finally:
            self.base.train()

    def _split(self, name: str) -> torch.Tensor:
        return torch.stack([torch.from_numpy(np.ascontiguousarray(getattr(sp, f"X_{name}"))) for sp in self.splits])

    def validate(self) -> list[dict[str, float]]:
        ys = [sp.y_val for sp in self.splits]
        return score_members(self._outputs(self._split("val")), ys, self.ds, self.splits, only=self.specs[0].monitor)

    def snapshot(self, k: int) -> dict[str, torch.Tensor]:
        state = {name: p[k].detach().clone() for name, p in zip(self.names, self.params)}
        return state | {name: b[k].clone() for name, b in self.buffers.items()}

    def restore(self, k: int, state: dict[str, torch.Tensor]) -> None:
        with torch.no_grad():
            for name, p in zip(self.names, self.params):
                p[k].copy_(state[name])
            for name, b in self.buffers.items():
                b[k].copy_(state[name])

    def final_metrics(self) -> list[dict[str, dict[str, float]]]:
        """Every metric on every split (train's feed the overfitting gap of any rank metric)."""
        out: list[dict[str, dict[str, float]]] = [{} for _ in self.specs]
        for split in ("train", "val", "test"):
            if getattr(self.splits[0], f"X_{split}") is None:
                continue
            ys = [getattr(sp, f"y_{split}") for sp in self.splits]
            for k, scores in enumerate(score_members(self._outputs(self._split(split)), ys, self.ds, self.splits)):
                out[k][split] = {m: v for m, v in scores.items() if m != "loss"}
        return out

    def end_diagnostics(self) -> list[dict[str, Any]]:
        """Each member's trained parameters put back in its own network, then as the single path."""
        out = []
        classes = len(self.ds.classes) if self.classify else None
        for k, (net, t, sp) in enumerate(zip(self.nets, self.trains, self.splits)):
            net.load_state_dict(self.snapshot(k), strict=False)  # a shared layer's other names alias it
            ends = diagnostics.at_end(net, self.Xtr[k, : self.probe], None)
            weights = [p[k] for p, w in zip(self.params, self.is_weight) if w]
            sparsity = regularizers.sparsity(weights, t.sparsity_tol)
            out.append({**ends, **sparsity, **diagnostics.scales(sp, classes), "stacked": self.members})
        return out

    def member_state(self, k: int) -> dict[str, np.ndarray]:
        """Member k's trained state under its own network's state_dict names."""
        net = self.nets[k]
        net.load_state_dict(self.snapshot(k), strict=False)  # a shared layer's other names alias it
        return {name: t.detach().numpy().copy() for name, t in net.state_dict().items()}

    def checkpoint_state(self) -> dict[str, Any]:
        raise NotImplementedError("stacked groups take no mid-job checkpoints (grouping.stack_key)")

    def load_checkpoint_state(self, saved: dict[str, Any]) -> None:
        raise NotImplementedError("stacked groups take no mid-job checkpoints (grouping.stack_key)")


_COUNTS: dict[tuple, tuple[int, int, int]] = {}


def network_counts(spec: JobSpec, ds: Dataset) -> tuple[int, int, int]:
    """(parameters, numbers all its modules output per example, multiply-adds per example of
    its dense and convolution layers) of a job's network, measured by building it once and
    running one example through it (footprint.network_counts counts the tool's own without
    building it, and a test holds the two equal)."""
    model = spec.settings.model
    n_out = len(ds.classes) if ds.task is Task.CLASSIFICATION else 1
    source = spec.module.sha256 if spec.module is not None else None  # None: the tool's own CNN
    in_shape = tuple(ds.shape[1:])
    key = (source, model, in_shape, n_out)
    if key not in _COUNTS:
        with torch.random.fork_rng(devices=[]):
            gens = (torch.Generator().manual_seed(0), torch.Generator().manual_seed(1))
            net = build_model(model, in_shape, n_out, gens[0], gens[1], spec.module)
            sizes: list[int] = []
            macs: list[int] = []

            def count(m: nn.Module, _inputs, out) -> None:
                sizes.append(out.numel() if torch.is_tensor(out) else 0)
                if isinstance(m, nn.Linear):
                    macs.append(m.in_features * m.out_features)
                elif isinstance(m, (nn.Conv1d, nn.Conv2d, nn.Conv3d)):
                    macs.append(out.numel() * (m.in_channels // m.groups) * math.prod(m.kernel_size))

            hooks = [m.register_forward_hook(count) for m in net.modules() if not list(m.children())]
            net.eval()
            with torch.no_grad():
                net(torch.zeros(1, *in_shape))
            for h in hooks:
                h.remove()
        _COUNTS[key] = (sum(p.numel() for p in net.parameters()), sum(sizes), sum(macs))
    return _COUNTS[key]
