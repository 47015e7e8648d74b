"""A gate comparing two runs of the same grid (e.g. last week's and today's), config by config.

When both runs share seeds, data fingerprint and split settings, each seed's pair of values
saw the same data order and initial weights, so the runs are compared seed by seed (exact
sign-flip test; corrected t when splits are redrawn per seed). Otherwise seeds do not pair
and Welch's unequal-variance t is used, and the result says so. Holm's step-down correction
(Holm 1979) keeps the chance of any false alarm across configurations at alpha whatever the
dependence between them; a max-statistic would gain only when changes are correlated across
configurations, which pairing by seed largely removes. Identical runs give p = 1.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from runner.evidence.distributions import t_cdf, t_isf, t_sf
from runner.evidence.paired import min_attainable_p, paired_difference, sign_flip_test
from runner.evidence.protocols import FIXED, Resampling
from runner.evidence.stats import holm

__all__ = ["VERDICTS", "ConfigChange", "GateResult", "Pairing", "compare_runs", "pairing"]

VERDICTS = ("regressed", "improved", "no shift shown", "too few seeds")


@dataclass(frozen=True, slots=True)
class Pairing:
    """Whether two runs pair by seed: paired, the shared seeds (sorted), and why."""

    paired: bool
    seeds: tuple
    reason: str


def pairing(old_seeds: Sequence, new_seeds: Sequence, same_data: bool, same_split: bool) -> Pairing:
    """Pair by seed only when the data fingerprint and split settings match and at least two
    seeds are shared; the reason names what stopped the pairing."""
    shared = tuple(sorted(set(old_seeds) & set(new_seeds)))
    if not same_data:
        return Pairing(False, shared, "data fingerprints differ: seeds do not pair (Welch t)")
    if not same_split:
        return Pairing(False, shared, "split settings differ: seeds do not pair (Welch t)")
    if len(shared) < 2:
        return Pairing(False, shared, f"{len(shared)} shared seed(s): too few to pair (Welch t)")
    return Pairing(True, shared, f"paired by seed over {len(shared)} shared seeds")


@dataclass(frozen=True, slots=True)
class ConfigChange:
    """One configuration's change new - old: means, change and its interval (low, high; None
    without spread), the p-value for |true change| > min_change, its Holm adjustment, the
    method used and the verdict (one of VERDICTS)."""

    index: int
    n_old: int
    n_new: int
    old_mean: float
    new_mean: float
    change: float
    low: float | None
    high: float | None
    p_value: float
    p_adjusted: float
    method: str
    verdict: str


@dataclass(frozen=True, slots=True)
class GateResult:
    """All configurations' changes; failed is True when any configuration regressed."""

    changes: tuple[ConfigChange, ...]
    paired: bool
    goal: str
    alpha: float
    min_change: float
    correction: str
    failed: bool


def _two_tails(p_up: float, p_down: float) -> float:
    return min(1.0, 2.0 * min(p_up, p_down))


def _paired(old: np.ndarray, new: np.ndarray, m: float, protocol: Resampling):
    d = new - old
    summary = paired_difference(d, protocol)
    if np.all(d == 0):
        return 1.0, summary.low, summary.high, "paired: identical values", 1.0
    if protocol.kind == "fixed":
        p = _two_tails(sign_flip_test(d, "greater", shift=m).p_value, sign_flip_test(d, "less", shift=-m).p_value)
        return p, summary.low, summary.high, "paired exact sign-flip", min_attainable_p(d.size)
    if summary.se is None:
        return 1.0, None, None, f"paired corrected t ({protocol.kind}): no spread, no verdict", 0.0
    df = d.size - 1
    p = _two_tails(t_sf((summary.mean - m) / summary.se, df), t_cdf((summary.mean + m) / summary.se, df))
    return p, summary.low, summary.high, f"paired corrected t ({protocol.kind})", 0.0


def _welch(old: np.ndarray, new: np.ndarray, m: float):
    n1, n2 = old.size, new.size
    diff = float(new.mean() - old.mean())
    if n1 < 2 or n2 < 2:
        return 1.0, None, None, "Welch t: fewer than 2 seeds on a side, no verdict", 1.0
    v1, v2 = old.var(ddof=1) / n1, new.var(ddof=1) / n2
    se = math.sqrt(v1 + v2)
    if se <= 1e-12 * max(float(np.abs(np.concatenate((old, new))).max()), 1e-300):
        # both sides constant: the new values are the most extreme of all C(n1+n2, n1) ways
        # to split the pooled values, so the exact two-sample permutation p is 2 / C(.)
        floor = min(1.0, 2.0 / math.comb(n1 + n2, n1))
        if diff == 0:
            return 1.0, None, None, "unpaired: identical constant values", floor
        p = 1.0 if abs(diff) <= m else floor
        return p, None, None, "unpaired, no spread on either side: exact permutation bound", floor
    df = (v1 + v2) ** 2 / (v1**2 / (n1 - 1) + v2**2 / (n2 - 1))
    half = t_isf(0.025, df) * se
    p = _two_tails(t_sf((diff - m) / se, df), t_cdf((diff + m) / se, df))
    return p, diff - half, diff + half, "unpaired Welch t (Welch 1947)", 0.0


def compare_runs(
    old: Sequence,
    new: Sequence,
    goal: str = "max",
    paired: bool = True,
    alpha: float = 0.05,
    min_change: float = 0.0,
    protocol: Resampling = FIXED,
) -> GateResult:
    """Judge every configuration's change between two runs; Holm across configurations.

    old[i], new[i]: the i-th configuration's per-seed values; when ``paired`` they must be
    in the same seed order (use ``pairing`` to decide). The null for each configuration is
    |true change| <= min_change (metric units), tested as two one-sided tests on the shifted
    values at alpha/2 each; with min_change 0 this is the ordinary two-sided test.
    """
    if goal not in ("max", "min"):
        raise ValueError(f"goal: unknown {goal!r}; allowed: max, min")
    if len(old) != len(new) or not len(old):
        raise ValueError(f"need the same, non-zero number of configurations, got {len(old)} and {len(new)}")
    if min_change < 0:
        raise ValueError(f"min_change must be >= 0, got {min_change}")
    rows = []
    for o, n in zip(old, new):
        o, n = np.asarray(o, dtype=float).ravel(), np.asarray(n, dtype=float).ravel()
        if paired and o.size != n.size:
            raise ValueError(f"paired runs need the same seeds on both sides, got {o.size} and {n.size} values")
        rows.append((o, n, *(_paired(o, n, min_change, protocol) if paired else _welch(o, n, min_change))))
    adjusted = holm([r[2] for r in rows])
    k = len(rows)
    changes = []
    for i, ((o, n, p, low, high, method, floor), p_adj) in enumerate(zip(rows, adjusted)):
        change = float(n.mean() - o.mean())
        if p_adj <= alpha:
            verdict = "improved" if (change > 0) == (goal == "max") else "regressed"
        elif "identical" not in method and min(1.0, k * floor) > alpha:
            verdict = "too few seeds"
        else:
            verdict = "no shift shown"
        changes.append(
            ConfigChange(
                i,
                o.size,
                n.size,
                float(o.mean()),
                float(n.mean()),
                change,
                low,
                high,
                float(p),
                float(p_adj),
                method,
                verdict,
            )
        )
    return GateResult(
        tuple(changes), paired, goal, alpha, min_change, "Holm", any(c.verdict == "regressed" for c in changes)
    )
