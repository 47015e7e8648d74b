"""Two factors crossed over matched seeds: F tests with seeds as blocks, interaction contrast
intervals, and matched main effects, for the ablation tables.

Seeds act as blocks (each seed fixes the data order and the initial weights shared by every
configuration), so seed-to-seed variation is removed before judging factors. An interaction
is claimed only when an interval for an interaction contrast excludes 0; the intervals are
Scheffe's (1953), simultaneous over every contrast of the interaction, which for a 2 x 2
table is the ordinary t interval and agrees with the F test for the interaction.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass

import numpy as np

from runner.evidence.distributions import f_isf, f_sf
from runner.evidence.paired import PairedDifference, paired_difference
from runner.evidence.protocols import FIXED, Resampling

__all__ = [
    "Effect",
    "InteractionContrast",
    "TwoWay",
    "interaction_contrasts",
    "matched_difference",
    "two_way_blocks",
]


@dataclass(frozen=True, slots=True)
class Effect:
    """One row of the analysis of variance: sum of squares, df, mean square, F and its p
    (F and p are None when the residual mean square is 0 or has no df)."""

    name: str
    ss: float
    df: int
    ms: float
    f: float | None
    p_value: float | None


@dataclass(frozen=True, slots=True)
class TwoWay:
    """F tests for factor A, factor B and A x B with seeds as blocks, on an a x b x n table.
    residual_ms and residual_df are those of the model seeds + A * B; variance_factor is
    n * v, the factor by which the resampling protocol inflates each effect's mean square
    under no effect (1 for a fixed split); F is divided by it."""

    a: Effect
    b: Effect
    interaction: Effect
    seeds: Effect
    residual_ms: float
    residual_df: int
    variance_factor: float
    protocol: str


def _check_table(y) -> np.ndarray:
    data = np.asarray(y, dtype=float)
    if data.ndim != 3 or min(data.shape) < 1 or not np.all(np.isfinite(data)):
        raise ValueError("expected a complete, finite a x b x n table (levels of A, levels of B, seeds)")
    if data.shape[0] < 2 or data.shape[1] < 2 or data.shape[2] < 2:
        raise ValueError(f"need at least 2 levels of each factor and 2 seeds, got shape {data.shape}")
    return data


def two_way_blocks(y, protocol: Resampling = FIXED) -> TwoWay:
    """Randomized-block two-way analysis: y[i, j, s] = mu + A_i + B_j + AB_ij + seed_s + e.

    Balanced sums of squares (the sequential ones of anova_lm on C(seed) + C(A) * C(B));
    residual df = (ab - 1)(n - 1). Under a protocol that redraws splits, each F is divided
    by n v (Nadeau & Bengio 2003's variance correction carried to the F ratio).
    """
    data = _check_table(y)
    a, b, n = data.shape
    grand = data.mean()
    cell = data.mean(axis=2)
    ma, mb, ms_ = data.mean(axis=(1, 2)), data.mean(axis=(0, 2)), data.mean(axis=(0, 1))
    ss_a = b * n * float(((ma - grand) ** 2).sum())
    ss_b = a * n * float(((mb - grand) ** 2).sum())
    ss_ab = n * float(((cell - ma[:, None] - mb[None, :] + grand) ** 2).sum())
    ss_seed = a * b * float(((ms_ - grand) ** 2).sum())
    resid = data - cell[:, :, None] - ms_[None, None, :] + grand
    ss_e = float((resid**2).sum())
    df_e = (a * b - 1) * (n - 1)
    ms_e = ss_e / df_e
    factor = n * protocol.variance_factor(n)
    degenerate = ms_e <= (1e-12 * max(float(np.abs(data - grand).max()), 1e-300)) ** 2

    def effect(name: str, ss: float, df: int) -> Effect:
        ms = ss / df
        if degenerate:
            return Effect(name, ss, df, ms, None, None)
        f = ms / ms_e / factor
        return Effect(name, ss, df, ms, f, f_sf(f, df, df_e))

    return TwoWay(
        effect("A", ss_a, a - 1),
        effect("B", ss_b, b - 1),
        effect("A x B", ss_ab, (a - 1) * (b - 1)),
        effect("seeds", ss_seed, n - 1),
        ms_e,
        df_e,
        factor,
        protocol.kind,
    )


@dataclass(frozen=True, slots=True)
class InteractionContrast:
    """(mean[i2, j2] - mean[i2, j]) - (mean[i, j2] - mean[i, j]): how much the effect of moving
    B from level j to j2 changes when A moves from i to i2, with a simultaneous interval
    (low, high); claimed is True only when the interval excludes 0. low/high are None when
    the residual variance is 0 (nothing measures the noise)."""

    a_levels: tuple[int, int]
    b_levels: tuple[int, int]
    estimate: float
    low: float | None
    high: float | None
    claimed: bool


def interaction_contrasts(y, level: float = 0.95, protocol: Resampling = FIXED) -> tuple[InteractionContrast, ...]:
    """Every 2 x 2 interaction contrast of an a x b x n table with Scheffe intervals.

    Half-width sqrt(q F_{q, df_e}(level)) * s * sqrt(4 v) with q = (a-1)(b-1), s^2 the
    residual mean square of seeds + A * B and v the protocol's variance factor (Scheffe
    1953); for a 2 x 2 table this is the t interval t_{df_e} * s * sqrt(4 v).
    """
    data = _check_table(y)
    a, b, n = data.shape
    table = two_way_blocks(data, protocol)
    cell = data.mean(axis=2)
    q = (a - 1) * (b - 1)
    v = protocol.variance_factor(n)
    if table.interaction.f is None:
        half = None
    else:
        half = math.sqrt(q * f_isf(1.0 - level, q, table.residual_df)) * math.sqrt(table.residual_ms * 4.0 * v)
    out = []
    for (i, i2), (j, j2) in itertools.product(itertools.combinations(range(a), 2), itertools.combinations(range(b), 2)):
        est = float(cell[i2, j2] - cell[i2, j] - cell[i, j2] + cell[i, j])
        low, high = (None, None) if half is None else (est - half, est + half)
        out.append(
            InteractionContrast((i, i2), (j, j2), est, low, high, bool(low is not None and (low > 0 or high < 0)))
        )
    return tuple(out)


def matched_difference(
    y, axis: int, level: int, base: int, protocol: Resampling = FIXED, confidence: float = 0.95
) -> PairedDifference:
    """Main effect of one factor: level minus base, averaged over matched cells (same levels
    of the other factors, same seed) within each seed, then a paired interval over seeds.

    y has one axis per factor followed by a last axis of seeds; the verdict's p-value is the
    exact sign-flip test (fixed split) or the corrected t (split redrawn), as in
    ``paired_difference``.
    """
    data = np.asarray(y, dtype=float)
    factor_axis = axis + data.ndim if axis < 0 else axis
    if data.ndim < 2 or not 0 <= factor_axis < data.ndim - 1:
        raise ValueError(f"axis {axis} is not a factor axis of a table with shape {data.shape}")
    if not np.all(np.isfinite(data)):
        raise ValueError("matched_difference: the table must be complete and finite")
    diff = np.take(data, level, axis=factor_axis) - np.take(data, base, axis=factor_axis)
    per_seed = diff.reshape(-1, data.shape[-1]).mean(axis=0)
    return paired_difference(per_seed, protocol, confidence)
