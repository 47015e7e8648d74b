"""How many seeds a comparison needs: to detect a difference, or to show equivalence.

Both use the observed paired spread as if it were the true one, so they are advice, not
guarantees. Power is an expectation over the sample sd (``scaled_chi_nodes``): for the
paired t, P(|T| > c) with T = (Z + delta) / S (the noncentral t); for Schuirmann's two
one-sided tests, P(-margin + c s sqrt(v) < mean < margin - c s sqrt(v)). With a protocol
that redraws splits, Var(mean) = (1/n + n_val/n_train) sigma^2 never falls below
(n_val/n_train) sigma^2, so some differences cannot be resolved by any number of seeds.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from runner.evidence.distributions import norm_cdf_array, scaled_chi_nodes, t_isf
from runner.evidence.paired import seeds_for_any_verdict
from runner.evidence.protocols import FIXED, Resampling

__all__ = ["SeedAdvice", "paired_t_power", "seeds_for_equivalence", "seeds_to_detect", "tost_power"]

_MAX_SEEDS = 100_000


@dataclass(frozen=True, slots=True)
class SeedAdvice:
    """n: the (fractional) number of seeds where power reaches the target (inf when no number
    does); seeds: n rounded up (None when unreachable); reachable; note says why."""

    n: float
    seeds: int | None
    reachable: bool
    note: str


def _variance_factor(protocol: Resampling, n: float) -> float:
    # fractional n, as power solvers use: v(n) = 1/n + the protocol's overlap term
    if protocol.kind == "fixed":
        return 1.0 / n
    if protocol.kind == "resample":
        return 1.0 / n + protocol.n_val / protocol.n_train
    return 1.0 / n + 1.0 / (protocol.folds - 1)


def paired_t_power(diff: float, sd: float, n: float, alpha: float = 0.05, protocol: Resampling = FIXED) -> float:
    """Power of the two-sided paired t-test at level alpha with n seeds (df = n - 1) for a
    true mean difference diff and sd of the per-seed differences sd (noncentral t: Owen 1965
    form E_S[Phi(delta - c S) + Phi(-delta - c S)], delta = diff / (sd sqrt(v)))."""
    if n < 2 or sd <= 0:
        raise ValueError(f"need n >= 2 and sd > 0, got n={n}, sd={sd}")
    delta = abs(diff) / (sd * math.sqrt(_variance_factor(protocol, n)))
    c = t_isf(alpha / 2.0, n - 1.0)
    s, w = scaled_chi_nodes(n - 1.0)
    return float(np.sum(w * (norm_cdf_array(delta - c * s) + norm_cdf_array(-delta - c * s))))


def tost_power(
    diff: float, sd: float, margin: float, n: float, alpha: float = 0.05, protocol: Resampling = FIXED
) -> float:
    """Power of Schuirmann's (1987) two one-sided paired t-tests, each at level alpha, to
    show |true difference| < margin when the true difference is diff (sd as above)."""
    if n < 2 or sd <= 0 or margin <= 0:
        raise ValueError(f"need n >= 2, sd > 0 and margin > 0, got n={n}, sd={sd}, margin={margin}")
    scale = sd * math.sqrt(_variance_factor(protocol, n))
    c = t_isf(alpha, n - 1.0)
    s, w = scaled_chi_nodes(n - 1.0)
    upper = norm_cdf_array((margin - diff) / scale - c * s)
    lower = norm_cdf_array((-margin - diff) / scale + c * s)
    return float(np.sum(w * np.maximum(upper - lower, 0.0)))


def _solve_n(power_at, target: float, what: str) -> SeedAdvice:
    """Smallest fractional n >= 2 with power_at(n) >= target (power rising in n)."""
    at_two = power_at(2.0)
    if at_two >= target:
        return SeedAdvice(2.0, 2, True, f"2 seeds already give {what} power {at_two:.2f}")
    if power_at(_MAX_SEEDS) < target:
        return SeedAdvice(
            math.inf,
            None,
            False,
            f"no number of seeds up to {_MAX_SEEDS} reaches {what} "
            f"power {target:.2f} (with redrawn splits the variance has a floor)",
        )
    lo, hi = 2.0, 4.0
    f_lo, f_hi = at_two - target, power_at(hi) - target
    while f_hi < 0:
        lo, f_lo, hi = hi, f_hi, hi * 2.0
        f_hi = power_at(hi) - target
    n = _root_in(lambda x: power_at(x) - target, lo, hi, f_lo, f_hi)
    return SeedAdvice(n, math.ceil(n - 1e-9), True, f"{what} power {target:.2f} at {n:.2f} seeds")


def _root_in(f, lo: float, hi: float, f_lo: float, f_hi: float) -> float:
    """The root of a rising f in [lo, hi] (f_lo < 0 <= f_hi) to 1e-8 relative, as the bracket's
    upper end (f >= 0 there): the Illinois variant of false position (Dowell & Jarratt 1971),
    which keeps a bracket like bisection but needs about 0.4 of its evaluations here (each
    one a quadrature)."""
    side = 0
    for _ in range(100):
        x = hi - f_hi * (hi - lo) / (f_hi - f_lo)
        if not lo < x < hi:
            x = (lo + hi) / 2.0
        fx = f(x)
        if fx < 0:
            lo, f_lo = x, fx
            if side == -1:
                f_hi /= 2.0
            side = -1
        else:
            hi, f_hi = x, fx
            if side == 1:
                f_lo /= 2.0
            side = 1
        if hi - lo < 1e-8 * hi or fx == 0:
            break
    return hi


def seeds_to_detect(
    diff: float, sd: float, alpha: float = 0.05, power: float = 0.8, protocol: Resampling = FIXED
) -> SeedAdvice:
    """Seeds for the two-sided paired t-test to detect diff with the given power, from the
    observed sd of paired differences. sd = 0 (no observed spread) gives the fewest seeds at
    which the exact sign-flip test can reach alpha at all, as the t-test is then undefined."""
    if sd == 0:
        if diff == 0:
            return SeedAdvice(math.inf, None, False, "no observed difference and no spread: nothing to detect")
        n = seeds_for_any_verdict(alpha)
        return SeedAdvice(float(n), n, True, f"no spread observed: {n} seeds let the sign-flip test reach {alpha}")
    if diff == 0:
        return SeedAdvice(math.inf, None, False, "the observed difference is 0: nothing to detect")
    return _solve_n(lambda n: paired_t_power(diff, sd, n, alpha, protocol), power, "detection")


def seeds_for_equivalence(
    margin: float, sd: float, diff: float = 0.0, alpha: float = 0.05, power: float = 0.8, protocol: Resampling = FIXED
) -> SeedAdvice:
    """Seeds for Schuirmann's two one-sided tests to show |difference| < margin with the given
    power when the true difference is diff, from the observed sd of paired differences."""
    if abs(diff) >= margin:
        return SeedAdvice(math.inf, None, False, "the difference is not inside the margin: equivalence cannot be shown")
    if sd == 0:
        return SeedAdvice(2.0, 2, True, "no spread observed: any 2 seeds bound the difference (advice only)")
    return _solve_n(lambda n: tost_power(diff, sd, margin, n, alpha, protocol), power, "equivalence")
