"""A network's raw outputs turned into its loss and metrics: one job's outputs
(``score_outputs``, the single path) and K members' logits at once (``score_members``, the
stacked path). Both compute the metrics through components/metrics.py; a member whose
outputs are not all finite gets NaN for everything."""

from __future__ import annotations

from typing import Any

import numpy as np
import torch
import torch.nn.functional as F

from runner.components.metrics import Task, evaluate, for_task, quick
from runner.datasets.sources import Dataset

__all__ = ["score_members", "score_outputs"]


@torch.no_grad()
def score_outputs(out: torch.Tensor, y: np.ndarray, ds: Dataset, sp: Any, only: str | None = None) -> dict[str, float]:
    """Loss and metrics of one network's raw outputs ``out`` for targets ``y``: all metrics
    of the task, or with ``only`` just that one (for per-epoch curves)."""
    if not torch.isfinite(out).all():
        names = [only] if only else for_task(ds.task)
        return {**{m: float("nan") for m in names}, "loss": float("nan")}
    if ds.task is Task.CLASSIFICATION:
        loss = float(F.cross_entropy(out, torch.from_numpy(y.astype(np.int64))))
        probs = torch.softmax(out.double(), dim=1).numpy()
        metrics = (
            {only: quick(only, y, probs, len(ds.classes))}
            if only
            else evaluate(Task.CLASSIFICATION, y, probs, len(ds.classes))
        )
    else:
        pred = out.squeeze(1).double().numpy() * sp.y_std + sp.y_mean
        loss = float(np.mean(((y - sp.y_mean) / sp.y_std - out.squeeze(1).double().numpy()) ** 2))
        metrics = {only: quick(only, y, pred)} if only else evaluate(Task.REGRESSION, y, pred)
    metrics["loss"] = loss
    return metrics


def _nan(names: list[str]) -> dict[str, float]:
    return {**{m: float("nan") for m in names}, "loss": float("nan")}


def score_members(
    logits: torch.Tensor, ys: list[np.ndarray], ds: Dataset, splits: list[Any], only: str | None = None
) -> list[dict[str, float]]:
    """``score_outputs`` for every member at once, from logits (K, outputs, rows)."""
    finite = torch.isfinite(logits).flatten(1).all(dim=1).tolist()
    names = [only] if only else for_task(ds.task)
    if ds.task is not Task.CLASSIFICATION:
        raw = logits[:, 0, :].double().numpy()
        out = []
        for k, (yk, sp) in enumerate(zip(ys, splits)):
            if not finite[k]:
                out.append(_nan(names))
                continue
            metrics = {m: quick(m, yk, raw[k] * sp.y_std + sp.y_mean) for m in names}
            out.append({**metrics, "loss": float(np.mean(((yk - sp.y_mean) / sp.y_std - raw[k]) ** 2))})
        return out
    y = torch.from_numpy(np.stack(ys).astype(np.int64)).unsqueeze(1)
    losses = (-torch.log_softmax(logits, dim=1).gather(1, y).mean(dim=(1, 2))).tolist()
    if names == ["accuracy"]:  # the usual per-epoch case: argmax of the logits, as of the
        # probabilities (softmax keeps each row's order), counted exactly and divided in float64
        # (numpy's argmax: torch's over a middle axis was measured much slower)
        hits = (logits.numpy().argmax(axis=1) == y[:, 0].numpy()).sum(axis=1).tolist()
        rows = y.shape[2]
        return [{"accuracy": h / rows, "loss": v} if ok else _nan(names) for h, v, ok in zip(hits, losses, finite)]
    probs = torch.softmax(logits.double(), dim=1).transpose(1, 2).numpy()  # (K, rows, classes)
    out = []
    for k, yk in enumerate(ys):
        if not finite[k]:
            out.append(_nan(names))
            continue
        metrics = {m: quick(m, yk, probs[k], len(ds.classes)) for m in names}
        out.append({**metrics, "loss": losses[k]})
    return out
