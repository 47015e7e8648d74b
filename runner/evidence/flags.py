"""Flags: what went wrong in a configuration's jobs, from their stored diagnostics.

Thresholds come from the recipe's [diagnostics] table; they act on stored numbers, so
changing them needs no rerun.
"""

from __future__ import annotations

import statistics
from typing import TYPE_CHECKING, Any

from runner.evidence.document import Flag

if TYPE_CHECKING:
    from runner.evidence.document import Counts
    from runner.recipe.loader import DiagnosticThresholds

__all__ = ["AVERAGED", "flags", "mean_diagnostics"]

AVERAGED = ("grad_ratio", "dead_fraction", "saturated_fraction", "zero_fraction", "near_zero_fraction", "gap")


def mean_diagnostics(diags: list[dict[str, Any]]) -> dict[str, float | None]:
    out = {}
    for name in AVERAGED:
        values = [d[name] for d in diags if d.get(name) is not None]
        out[name] = statistics.fmean(values) if values else None
    return out


def _median(diags: list[dict[str, Any]], name: str) -> float | None:
    values = [d[name] for d in diags if d.get(name) is not None]
    return statistics.median(values) if values else None


def flags(diags: list[dict[str, Any]], counts: Counts, th: DiagnosticThresholds) -> list[Flag]:
    out = []
    total = counts.finished
    if counts.diverged:
        out.append(Flag("diverged", f"diverged {counts.diverged}/{total}"))
    if counts.failed:
        out.append(Flag("failed", f"failed {counts.failed}/{total}"))
    if counts.timeout:
        out.append(Flag("timed_out", f"timed out {counts.timeout}/{total}"))
    ratio = _median(diags, "grad_ratio")
    if ratio is not None and ratio < th.vanishing_below:
        out.append(Flag("vanishing_gradients", "vanishing gradients"))
    if ratio is not None and ratio > th.exploding_above:
        out.append(Flag("exploding_gradients", "exploding gradients"))
    dead = _median(diags, "dead_fraction")
    if dead is not None and dead > th.dead_above:
        out.append(Flag("dead_units", "dead units"))
    sat = _median(diags, "saturated_fraction")
    if sat is not None and sat > th.saturated_above:
        out.append(Flag("saturated_units", "saturated units"))
    gap = _median(diags, "gap")
    if gap is not None and gap > th.gap_above:
        out.append(Flag("overfitting", "overfitting"))
    return out
