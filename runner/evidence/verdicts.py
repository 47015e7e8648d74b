"""The board's verdicts: which configurations may be the best, from the stored per-seed values.

One rule, applied on the board, in the ablation tables, the diff and the report:
- a configuration with a seed that did not finish (diverged, failed, timed out) is never
  ranked on its survivors: it ranks below every configuration whose seeds all finished,
  gets no verdict and enters no comparison (its flags say what happened);
- the verdicts rest on the seeds every remaining configuration finished (matched seeds);
  under k-fold validation, on every fold of those seeds;
- the possibly-best set comes from simultaneous intervals over all configurations
  (``selection.possibly_best``: constrained multiple comparisons with the best, with the
  studentized-range constant by default), with the protocol's variance (a fixed split,
  Nadeau & Bengio 2003's correction when each seed redraws the split, Bouckaert & Frank
  2004's for repeated k-fold). Every truly best configuration is in the set with probability
  at least 1 - alpha; bench/verdicts.py measures the error rates through this module.
- rows that cannot be separated from the best are never called tied: their verdict shows
  how far they may still trail; with a margin, "within_margin" needs both simultaneous
  bounds inside +-margin (two one-sided tests, Schuirmann 1987).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from runner.evidence.document import Verdict
from runner.evidence.paired import min_attainable_p
from runner.evidence.protocols import Resampling
from runner.evidence.selection import BestSet, possibly_best

__all__ = ["Assessment", "assess", "matched_units"]


@dataclass(frozen=True)
class Assessment:
    """The verdicts of one board: per configuration id, and what they rest on."""

    verdicts: dict[str, Verdict]
    units: list[tuple[int, int | None]]  # the matched (seed, fold) units the verdicts rest on
    method: str
    best_set: BestSet | None


def matched_units(values: dict[str, dict[tuple[int, int | None], float]], candidates: Sequence[str]):
    """The (seed, fold) units every candidate finished, in seed and fold order; under k-fold
    validation a seed counts only with all of its folds."""
    if not candidates:
        return []
    common = set.intersection(*(set(values[c]) for c in candidates))
    seeds: dict[int, list] = {}
    for seed, fold in common:
        seeds.setdefault(seed, []).append(fold)
    folds_per_seed = max((len(f) for f in seeds.values()), default=0)
    keep = [s for s, f in seeds.items() if len(f) == folds_per_seed]
    return sorted(((s, f) for s in keep for f in seeds[s]), key=lambda u: (u[0], -1 if u[1] is None else u[1]))


def _no_verdict(ids: Sequence[str], reason: str) -> dict[str, Verdict]:
    return {c: Verdict("no_verdict", None, None, None, reason) for c in ids}


def assess(
    values: dict[str, dict[tuple[int, int | None], float]],
    complete: dict[str, bool],
    goal: str,
    protocol: Resampling,
    alpha: float = 0.05,
    margin: float = 0.0,
) -> Assessment:
    """Verdicts for every configuration from ``values[config][(seed, fold)]`` (finished jobs'
    validation metric). ``complete[config]`` is False when a seed of it did not finish.
    ``protocol`` must describe the matched units (its repeats equal to the matched seeds under
    k-fold validation; assess sets them)."""
    incomplete = [c for c in values if not complete[c]]
    candidates = [c for c in values if complete[c] and values[c]]
    verdicts = _no_verdict(incomplete, "not all seeds finished: never ranked on its survivors")
    verdicts |= _no_verdict([c for c in values if complete[c] and not values[c]], "no finished seed yet")
    units = matched_units(values, candidates)
    seeds = sorted({s for s, _ in units})
    if len(candidates) < 2 or len(seeds) < 2:
        why = "fewer than 2 configurations to compare" if len(candidates) < 2 else "fewer than 2 seeds shared"
        return Assessment(verdicts | _no_verdict(candidates, why), units, "none", None)
    if protocol.kind == "repeated_kfold":
        protocol = Resampling.repeated_kfold(protocol.folds, len(seeds))
    y = np.array([[values[c][u] for u in units] for c in candidates])
    best = possibly_best(y, goal, alpha, protocol, margin=margin or None)
    for i, c in enumerate(candidates):
        kind = "possibly_best" if best.possibly_best[i] else "behind"
        if best.within_margin is not None and best.within_margin[i]:
            kind = "within_margin"
        low, high = best.lower[i], best.upper[i]
        verdicts[c] = Verdict(kind, best.advantage[i], _finite(low), _finite(high), best.basis)
    return Assessment(verdicts, units, best.basis, best)


def _finite(x: float) -> float | None:
    return None if x is None or not np.isfinite(x) else float(x)


def exact_floor(n_seeds: int) -> float:
    """The smallest two-sided p an exact paired test can give with n seeds (2 / 2^n)."""
    return min_attainable_p(n_seeds)
