"""Paired comparisons over seeds that stay well defined with few seeds, ties and zero spread.

Accuracy is discrete, so two configurations often differ by the same amount on every seed.
A paired t-test then divides by zero; the exact sign-flip test does not: it asks how many
of the 2^n sign patterns of the differences give a sum at least as extreme, so its p-value
is never below 2/2^n (0.5 with 2 seeds) and a constant difference is judged by its sign
alone. The corrected t (Nadeau & Bengio 2003) is kept for intervals and for protocols that
redraw the split per seed, where the seed-level differences are correlated and sign flips
are not exchangeable.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from runner.evidence.distributions import t_cdf, t_isf, t_sf
from runner.evidence.protocols import FIXED, Resampling

__all__ = [
    "EXACT_MAX_N",
    "PairedDifference",
    "SignFlip",
    "min_attainable_p",
    "paired_difference",
    "seeds_for_any_verdict",
    "sign_flip_test",
]

EXACT_MAX_N = 20  # 2^20 sign patterns: about 8 MB of sums, well under a second
_ALTERNATIVES = ("two-sided", "greater", "less")


@dataclass(frozen=True, slots=True)
class SignFlip:
    """Result of the sign-flip test: p_value; n differences; exact (all 2^n patterns) or
    Monte Carlo over ``resamples`` patterns; the observed sum of differences."""

    p_value: float
    n: int
    exact: bool
    resamples: int
    statistic: float


def _flip_sums(d: np.ndarray) -> np.ndarray:
    """Sums of +-d_i over all 2^n sign patterns (the observed pattern included)."""
    sums = np.zeros(1)
    for value in d:
        sums = np.concatenate((sums + value, sums - value))
    return sums


def _random_flip_sums(d: np.ndarray, resamples: int, rng: np.random.Generator) -> np.ndarray:
    out = np.empty(resamples)
    chunk = max(1, 2**22 // max(len(d), 1))
    for start in range(0, resamples, chunk):
        stop = min(resamples, start + chunk)
        signs = rng.integers(0, 2, size=(stop - start, len(d))) * 2 - 1
        out[start:stop] = signs @ d
    return out


def sign_flip_test(
    d,
    alternative: str = "two-sided",
    shift: float = 0.0,
    rng: np.random.Generator | None = None,
    resamples: int = 100_000,
) -> SignFlip:
    """Exact sign-flip (paired permutation) test of a zero centre for the differences d - shift.

    Two-sided p = min(1, 2 min(P(S >= s), P(S <= s))) over the 2^n sign patterns, as
    scipy.stats.permutation_test(permutation_type="samples", n_resamples=inf) counts them.
    Sums within 1e-10 of the total |d| are ties, so decimals that are equal on paper tie.
    Above EXACT_MAX_N differences it draws ``resamples`` random patterns from ``rng``
    (required then) and uses (1 + hits) / (1 + resamples) (Phipson & Smyth 2010).
    """
    if alternative not in _ALTERNATIVES:
        raise ValueError(f"alternative: unknown {alternative!r}; allowed: {', '.join(_ALTERNATIVES)}")
    x = np.asarray(d, dtype=float).ravel() - shift
    if x.size == 0 or not np.all(np.isfinite(x)):
        raise ValueError("sign-flip test: need at least one finite difference")
    observed = float(x.sum())
    tol = 1e-10 * float(np.abs(x).sum())
    if x.size <= EXACT_MAX_N:
        sums = _flip_sums(x)
        greater = np.count_nonzero(sums >= observed - tol) / sums.size
        less = np.count_nonzero(sums <= observed + tol) / sums.size
        exact, count = True, sums.size
    else:
        if rng is None:
            raise ValueError(
                f"sign-flip test: more than {EXACT_MAX_N} differences need a "
                "numpy Generator (rng=) for the Monte Carlo patterns"
            )
        sums = _random_flip_sums(x, resamples, rng)
        greater = (1 + np.count_nonzero(sums >= observed - tol)) / (1 + resamples)
        less = (1 + np.count_nonzero(sums <= observed + tol)) / (1 + resamples)
        exact, count = False, resamples
    p = {"greater": greater, "less": less, "two-sided": min(1.0, 2.0 * min(greater, less))}[alternative]
    return SignFlip(float(p), int(x.size), exact, count, observed)


def min_attainable_p(n: int, alternative: str = "two-sided") -> float:
    """Smallest p-value the exact sign-flip test can give with n seeds: 2/2^n two-sided,
    1/2^n one-sided (every difference of one sign). 1.0 for n < 1."""
    if n < 1:
        return 1.0
    return min(1.0, (2.0 if alternative == "two-sided" else 1.0) / 2.0**n)


def seeds_for_any_verdict(alpha: float = 0.05, comparisons: int = 1, alternative: str = "two-sided") -> int:
    """Fewest seeds with which the sign-flip test can reach alpha / comparisons at all
    (6 seeds for one two-sided comparison at 5%)."""
    if not 0 < alpha < 1 or comparisons < 1:
        raise ValueError(f"need 0 < alpha < 1 and comparisons >= 1, got {alpha}, {comparisons}")
    n = 1
    while min_attainable_p(n, alternative) > alpha / comparisons:
        n += 1
    return n


@dataclass(frozen=True, slots=True)
class PairedDifference:
    """A paired difference over n seeds.

    mean, sd (ddof 1), se = sd * sqrt(v) with v from the resampling protocol, df = n - 1;
    t and the interval (low, high) at ``level`` are None when sd is 0 or n < 2 (a t
    interval of zero width would claim certainty). p_value is the one a verdict should use,
    named by ``basis``: the exact sign-flip test for a fixed split, the corrected t when the
    split is redrawn per seed (then zero spread gives p = 1: no verdict, since the overlap
    of training sets leaves no exact test). t_p_value is the corrected t's own p (None
    without spread).
    """

    n: int
    mean: float
    sd: float | None
    se: float | None
    df: int
    t: float | None
    t_p_value: float | None
    low: float | None
    high: float | None
    p_value: float
    basis: str
    level: float


def paired_difference(d, protocol: Resampling = FIXED, level: float = 0.95) -> PairedDifference:
    """Summarize the per-seed differences d (a - b on matched seeds).

    Corrected t: t = mean / (sd * sqrt(v)), v = protocol.variance_factor(n), df = n - 1
    (Student 1908; Nadeau & Bengio 2003 for v). For n = 1 p = 1 and nothing else is given.
    """
    x = np.asarray(d, dtype=float).ravel()
    n = x.size
    if n == 0:
        raise ValueError("paired difference: no matched seeds")
    mean = float(x.mean())
    if n < 2:
        return PairedDifference(n, mean, None, None, 0, None, None, None, None, 1.0, "one seed: no test", level)
    sd = float(x.std(ddof=1))
    spread = sd > 1e-12 * max(float(np.abs(x).max()), 1e-300)
    t = t_p = low = high = se = None
    if spread:
        se = sd * math.sqrt(protocol.variance_factor(n))
        t = mean / se
        t_p = min(1.0, 2.0 * (t_sf(t, n - 1) if t > 0 else t_cdf(t, n - 1)))
        half = t_isf((1.0 - level) / 2.0, n - 1) * se
        low, high = mean - half, mean + half
    if protocol.kind == "fixed":
        p, basis = sign_flip_test(x).p_value, "exact sign-flip test"
    elif spread:
        p, basis = t_p, f"corrected t ({protocol.kind})"
    else:
        p = 1.0
        basis = f"no spread across seeds: the corrected t ({protocol.kind}) is undefined; no verdict"
    return PairedDifference(n, mean, sd, se, n - 1, t, t_p, low, high, float(p), basis, level)
