"""The single-job backend of the training loop: one job as an ordinary torch model, trained
with autograd and torch.optim, on the CPU.

Every random draw comes from generators seeded by the job's seed (streams.py): the split
(scikit-learn's random_state), initialization, mini-batch order and dropout masks each have
their own stream. With torch's deterministic algorithms and a fixed thread count, the same
job gives bitwise-identical numbers on the same machine.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F

from runner.components import regularizers
from runner.components.metrics import Task
from runner.components.optimizers import build_optimizer
from runner.datasets.sources import Dataset
from runner.datasets.splits import Splits, split_and_scale
from runner.training import diagnostics
from runner.training.job import JobSpec
from runner.training.models import build_model, weight_tensors
from runner.training.scoring import score_outputs
from runner.training.streams import streams

__all__ = ["SingleBackend"]


class SingleBackend:
    """One job: its split, network, optimizer and random streams."""

    members = 1
    stacked = False

    def __init__(self, spec: JobSpec, ds: Dataset, splits: Splits | None = None):
        """``splits``: rows to train on other than the seed's own split (a refit on
        train+val, training/replay.py)."""
        self.spec, self.ds = spec, ds
        self.train_s = spec.settings.train
        self.sp = splits if splits is not None else split_and_scale(ds, spec.settings.data, spec.seed, spec.fold)
        self.classify = ds.task is Task.CLASSIFICATION
        self.Xtr, self.ytr = self._tensors(self.sp.X_train, self.sp.y_train)
        self.Xva, _ = self._tensors(self.sp.X_val, self.sp.y_val)
        _, self.shuffle_gen, self.drop_gen = gens = streams(spec.seed)
        n_out = len(ds.classes) if self.classify else 1
        self.net = build_model(spec.settings.model, tuple(self.Xtr.shape[1:]), n_out, gens[0], gens[2], spec.module)
        if self.Xtr.dim() == 4:  # images: convolutions and pooling run faster channels-last on a CPU
            self.net = self.net.to(memory_format=torch.channels_last)
            self.Xtr = self.Xtr.contiguous(memory_format=torch.channels_last)
            self.Xva = self.Xva.contiguous(memory_format=torch.channels_last)
        self.opt = build_optimizer(self.net, self.train_s)
        self.weights = weight_tensors(self.net)
        self.n = len(self.Xtr)
        self.batch = self.train_s.batch_rows(self.n)
        self.steps_per_epoch = math.ceil(self.n / self.batch)
        self.probe = slice(0, min(diagnostics.PROBE_ROWS, self.n))
        self.order: torch.Tensor | None = None
        self.loss: torch.Tensor | None = None

    def _tensors(self, X: np.ndarray, y: np.ndarray) -> tuple[torch.Tensor, torch.Tensor]:
        Xt = torch.from_numpy(np.ascontiguousarray(X))
        if self.classify:
            return Xt, torch.from_numpy(y.astype(np.int64))
        return Xt, torch.from_numpy(((y - self.sp.y_mean) / self.sp.y_std).astype(np.float32))

    def _loss_fn(self, out: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
        return F.cross_entropy(out, y) if self.classify else F.mse_loss(out.squeeze(1), y)

    def split_records(self) -> list[dict[str, Any]]:
        return [self.sp.rows.record()]

    def initial_diagnostics(self) -> list[dict[str, Any]]:
        return [diagnostics.at_init(self.net, self.Xtr[self.probe], self.ytr[self.probe], self._loss_fn)]

    def begin_epoch(self) -> None:
        self.net.train()
        self.order = torch.randperm(self.n, generator=self.shuffle_gen)

    def losses(self, step: int) -> tuple[list[float], int]:
        idx = self.order[step * self.batch : (step + 1) * self.batch]
        self.opt.zero_grad(set_to_none=True)
        self.loss = self._loss_fn(self.net(self.Xtr[idx]), self.ytr[idx])
        return [self.loss.item()], len(idx)

    def update(self, lrs: list[float], active: list[bool]) -> None:
        lr, t = lrs[0], self.train_s
        for group in self.opt.param_groups:
            group["lr"] = lr
        penalty = regularizers.penalty(self.weights, t)
        (self.loss if penalty is None else self.loss + penalty).backward()
        if t.clip_norm > 0:
            torch.nn.utils.clip_grad_norm_(self.net.parameters(), t.clip_norm)
        self.opt.step()
        if t.proximal_l1 > 0:
            regularizers.proximal_l1_(self.weights, lr, t.proximal_l1)

    @torch.no_grad()
    def _evaluate(self, X: torch.Tensor, y: np.ndarray, only: str | None = None) -> dict[str, float]:
        """Metrics in eval mode (dropout off, batch-norm running statistics)."""
        self.net.eval()
        out = self.net(X)
        self.net.train()
        return score_outputs(out, y, self.ds, self.sp, only)

    def validate(self) -> list[dict[str, float]]:
        return [self._evaluate(self.Xva, self.sp.y_val, only=self.spec.monitor)]

    def snapshot(self, k: int) -> dict[str, torch.Tensor]:
        return {name: v.clone() for name, v in self.net.state_dict().items()}

    def restore(self, k: int, state: dict[str, torch.Tensor]) -> None:
        self.net.load_state_dict(state)

    def final_metrics(self) -> list[dict[str, dict[str, float]]]:
        """Every metric on every split (train's feed the overfitting gap of any rank metric)."""
        out = {}
        sp = self.sp
        for split, X, y in (
            ("train", sp.X_train, sp.y_train),
            ("val", sp.X_val, sp.y_val),
            ("test", sp.X_test, sp.y_test),
        ):
            if X is not None:
                Xt = torch.from_numpy(np.ascontiguousarray(X))
                if Xt.dim() == 4:
                    Xt = Xt.contiguous(memory_format=torch.channels_last)
                metrics = self._evaluate(Xt, y)
                metrics.pop("loss")
                out[split] = metrics
        return [out]

    def end_diagnostics(self) -> list[dict[str, Any]]:
        model = self.spec.settings.model  # a user's network: each activation module by its own kind
        ends = diagnostics.at_end(self.net, self.Xtr[self.probe], None if model.kind == "python" else model.activation)
        scales = diagnostics.scales(self.sp, len(self.ds.classes) if self.classify else None)
        return [{**ends, **regularizers.sparsity(self.weights, self.train_s.sparsity_tol), **scales}]

    def member_state(self, k: int) -> dict[str, np.ndarray]:
        return {name: t.detach().numpy().copy() for name, t in self.net.state_dict().items()}

    def checkpoint_state(self) -> dict[str, Any]:
        return {
            "model": self.net.state_dict(),
            "optimizer": self.opt.state_dict(),
            "shuffle_rng": self.shuffle_gen.get_state(),
            "dropout_rng": self.drop_gen.get_state(),
            "global_rng": torch.get_rng_state(),  # draws inside a user network's forward
        }

    def load_checkpoint_state(self, saved: dict[str, Any]) -> None:
        self.net.load_state_dict(saved["model"])
        self.opt.load_state_dict(saved["optimizer"])
        self.shuffle_gen.set_state(saved["shuffle_rng"])
        self.drop_gen.set_state(saved["dropout_rng"])
        if "global_rng" in saved:
            torch.set_rng_state(saved["global_rng"])
