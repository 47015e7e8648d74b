"""Which configurations may be the best: Hsu's constrained multiple comparisons with the best.

Testing every row against the observed best ignores that the best was picked from the same
numbers. Hsu's MCB (Hsu 1996, randomized blocks with seeds as blocks) gives simultaneous
intervals for mu_i - max_{j != i} mu_j; the rows whose interval reaches 0 form the
possibly-best set. Two constants set the intervals' width:

- "dunnett" (Hsu's own): the set contains *a* truly best row with probability >= 1 - alpha.
  With ties it promises only one of the tied rows, so when all rows are equal it leaves
  some row out far more often than alpha (bench/verdicts.py measures how often).
- "range" (the default): Tukey's studentized range; every truly best row, ties included,
  stays in the set with probability >= 1 - alpha, so a row is put behind only when some
  other row is shown better by a simultaneous pairwise interval. Wider, hence larger sets.

The same bounds decide equivalence within a practical margin (Schuirmann's two one-sided
tests, made selection-aware by using the simultaneous bounds).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from runner.evidence.paired import min_attainable_p
from runner.evidence.protocols import FIXED, Resampling
from runner.evidence.simultaneous import dunnett_one_sided, range_quantile

__all__ = ["BestSet", "possibly_best"]

_GOALS = ("max", "min")
_CONSTANTS = ("range", "dunnett")


@dataclass(frozen=True, slots=True)
class BestSet:
    """Constrained MCB over k configurations and n matched seeds, in metric units.

    advantage[i] = mean_i - (best mean among the others), signed so that positive is better
    for the goal ("max": larger is better; "min": smaller is better). lower/upper bound the
    true advantage simultaneously for all rows (-inf/inf when the data cannot bound it;
    None for a single configuration). possibly_best[i]: advantage + w >= 0, the row cannot
    be ruled out as the best. shortfall[i] = -lower[i]: the largest amount the data still
    allow the row to trail the best of the others (report it for rows that cannot be
    separated from the best). within_margin[i] (when a margin is given): lower > -margin
    and upper < margin. basis: "constrained MCB, studentized range", "Hsu MCB", "zero
    residual variance: exact sign-flip bound", "one seed: no verdict" or "one
    configuration". constant: "range" or "dunnett"; critical: Tukey's q or Dunnett's d;
    half_width: w = q s sqrt(v) or d s sqrt(2 v); residual_sd: s; protocol: its kind.
    """

    goal: str
    alpha: float
    k: int
    n: int
    df: int
    means: tuple[float, ...]
    advantage: tuple[float, ...]
    lower: tuple[float, ...] | None
    upper: tuple[float, ...] | None
    possibly_best: tuple[bool, ...]
    shortfall: tuple[float, ...] | None
    within_margin: tuple[bool, ...] | None
    margin: float | None
    residual_sd: float | None
    critical: float | None
    half_width: float | None
    basis: str
    protocol: str
    constant: str


def _residual_ms(y: np.ndarray) -> tuple[float, int]:
    """Residual mean square of the additive two-way layout (configurations + seeds)."""
    k, n = y.shape
    resid = y - y.mean(axis=1, keepdims=True) - y.mean(axis=0, keepdims=True) + y.mean()
    df = (k - 1) * (n - 1)
    return float((resid**2).sum() / df), df


def _advantage(means: np.ndarray) -> np.ndarray:
    """mean_i - max_{j != i} mean_j for each i."""
    order = np.argsort(means)[::-1]
    top, second = means[order[0]], means[order[1]]
    others_best = np.where(np.arange(means.size) == order[0], second, top)
    return means - others_best


def _no_spread_half_width(k: int, n: int, alpha: float, constant: str) -> float:
    """Half-width when every residual is 0, so each pairwise difference is the same on every
    seed: 0 when the exact sign-flip test of such a difference can reach alpha after
    Bonferroni (one-sided over the k - 1 rivals for "dunnett", two-sided over the k(k-1)/2
    pairs for "range"); otherwise nothing is bounded."""
    if constant == "dunnett":
        return 0.0 if min_attainable_p(n, "greater") <= alpha / (k - 1) else math.inf
    return 0.0 if min_attainable_p(n) <= alpha / (k * (k - 1) / 2) else math.inf


def _check_arguments(goal: str, constant: str, margin: float | None) -> None:
    if goal not in _GOALS:
        raise ValueError(f"goal: unknown {goal!r}; allowed: {', '.join(_GOALS)}")
    if constant not in _CONSTANTS:
        raise ValueError(f"constant: unknown {constant!r}; allowed: {', '.join(_CONSTANTS)}")
    if margin is not None and not margin > 0:
        raise ValueError(f"margin must be > 0, got {margin}")


def _unbounded(common: dict, means: np.ndarray, adv: np.ndarray, k: int, margin: float | None, basis: str) -> BestSet:
    """No interval can be formed: one configuration (nothing to compare) or one seed (no spread)."""
    inf = (math.inf,) * k if k > 1 else None
    return BestSet(
        **common, df=0, means=tuple(means.tolist()), advantage=tuple(adv.tolist()),
        lower=tuple(-v for v in inf) if inf else None, upper=inf, possibly_best=(True,) * k, shortfall=inf,
        within_margin=(False,) * k if (margin is not None and inf) else None, margin=margin,
        residual_sd=None, critical=None, half_width=None, basis=basis,
    )  # fmt: skip


def _half_width(oriented: np.ndarray, alpha: float, protocol: Resampling, constant: str, family: int):
    """(residual sd, critical constant, half-width w, basis) of the simultaneous intervals;
    the constant covers ``family`` configurations (at least the rows of ``oriented``)."""
    rows, n = oriented.shape
    k = max(rows, family)
    ms, df = _residual_ms(oriented)
    scale = float(np.abs(oriented - oriented.mean()).max())
    v = protocol.variance_factor(n)
    if constant == "dunnett":
        d, spread = dunnett_one_sided(k - 1, df, alpha), math.sqrt(2.0 * v)
    else:
        d, spread = range_quantile(k, df, alpha), math.sqrt(v)
    if ms <= (1e-12 * scale) ** 2:
        w = _no_spread_half_width(k, n, alpha, constant)
        if protocol.kind != "fixed":
            w = math.inf  # correlated seeds: sign flips do not apply, nothing is bounded
        return 0.0, d, w, "zero residual variance: exact sign-flip bound"
    sd = math.sqrt(ms)
    basis = "Hsu MCB" if constant == "dunnett" else "constrained MCB, studentized range"
    return sd, d, d * sd * spread, basis


def possibly_best(
    y,
    goal: str = "max",
    alpha: float = 0.05,
    protocol: Resampling = FIXED,
    margin: float | None = None,
    constant: str = "range",
    family: int | None = None,
) -> BestSet:
    """Constrained MCB on a complete k x n matrix y (configurations x matched seeds).

    s^2 = residual mean square of configurations + seeds, df = (k-1)(n-1); v =
    protocol.variance_factor(n) (1/n for a fixed split; Nadeau & Bengio 2003 otherwise);
    w = d s sqrt(2 v) with d the one-sided Dunnett constant for k-1 comparisons (Hsu 1996),
    or w = q s sqrt(v) with q the studentized range quantile for k means (Tukey 1953).
    Row i: [min(0, a_i - w), max(0, a_i + w)] with a_i its advantage. A residual variance of
    exactly 0 is not evidence of no noise: see ``_no_spread_half_width``. ``family``: the
    number of configurations the critical constant covers when y holds only some of them
    (the survivors of a race, race.py); default and minimum: the rows of y.
    """
    _check_arguments(goal, constant, margin)
    data = np.asarray(y, dtype=float)
    if data.ndim != 2 or data.size == 0 or not np.all(np.isfinite(data)):
        raise ValueError("possibly_best: y must be a complete, finite k x n matrix (matched seeds only)")
    k, n = data.shape
    common = {"goal": goal, "alpha": alpha, "k": k, "n": n, "protocol": protocol.kind, "constant": constant}
    means = data.mean(axis=1)
    if k == 1:
        return _unbounded(common, means, np.zeros(1), 1, margin, "one configuration")
    oriented = (1.0 if goal == "max" else -1.0) * data
    adv = _advantage(oriented.mean(axis=1))
    if n == 1:
        return _unbounded(common, means, adv, k, margin, "one seed: no verdict")
    sd, d, w, basis = _half_width(oriented, alpha, protocol, constant, family or k)
    lower = np.minimum(0.0, adv - w)
    upper = np.maximum(0.0, adv + w)
    best = adv + w >= 0  # a row tied at the boundary is kept
    within = None if margin is None else tuple(bool(x) for x in (lower > -margin) & (upper < margin))
    return BestSet(
        **common, df=(k - 1) * (n - 1), means=tuple(means.tolist()), advantage=tuple(adv.tolist()),
        lower=tuple(lower.tolist()), upper=tuple(upper.tolist()), possibly_best=tuple(bool(b) for b in best),
        shortfall=tuple((-lower).tolist()), within_margin=within, margin=margin, residual_sd=sd, critical=d,
        half_width=w, basis=basis,
    )  # fmt: skip
