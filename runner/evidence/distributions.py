"""Normal, Student t and F distribution functions in plain Python (math + numpy).

Written out so the read-only commands need not import scipy.stats or scipy.special (their
import costs are in bench/RESULTS.md) to print a verdict. The t and F functions go through the
regularized incomplete beta function, evaluated by its continued fraction (Didonato &
Morris 1992's choice of side) with a log-beta that avoids cancellation for large degrees of
freedom; quantiles are found by safeguarded Newton steps on the log of a tail. Tests hold
them to scipy.stats to ~1e-12 relative. ``scaled_chi_nodes`` gives a quadrature rule over
the distribution of s / sigma, shared by the Dunnett constant and the power calculations.
"""

from __future__ import annotations

import math
from functools import lru_cache

import numpy as np

__all__ = [
    "f_isf",
    "f_sf",
    "norm_cdf",
    "norm_cdf_array",
    "norm_isf",
    "norm_ppf",
    "norm_sf",
    "scaled_chi_nodes",
    "t_cdf",
    "t_isf",
    "t_pdf",
    "t_ppf",
    "t_sf",
]

_EPS = 1e-16
_TINY = 1e-300
_LN_SQRT_2PI = 0.5 * math.log(2 * math.pi)


# --- normal ------------------------------------------------------------------------------


def norm_cdf(x: float) -> float:
    """P(Z <= x) for a standard normal Z."""
    return 0.5 * math.erfc(-x / math.sqrt(2.0))


def norm_sf(x: float) -> float:
    """P(Z > x) for a standard normal Z, precise far into the upper tail."""
    return 0.5 * math.erfc(x / math.sqrt(2.0))


_STEP = 1.0 / 512.0
_REACH = 9.0  # beyond +-9 the normal cdf is within 1.2e-19 of 0 or 1


@lru_cache(maxsize=1)
def _cdf_table() -> tuple[np.ndarray, np.ndarray]:
    grid = np.arange(-_REACH, _REACH + _STEP / 2, _STEP)
    values = np.array([norm_cdf(x) for x in grid])
    slopes = np.exp(-0.5 * grid * grid - _LN_SQRT_2PI) * _STEP
    return values, slopes


def norm_cdf_array(x) -> np.ndarray:
    """Standard normal cdf of an array to ~1e-13 absolute error (not relative: use norm_cdf
    for far tails). Cubic Hermite interpolation of a table with exact slopes, step 1/512,
    whose error is below step^4 * max(fourth derivative) / 384."""
    x = np.clip(np.asarray(x, dtype=float), -_REACH, _REACH)
    values, slopes = _cdf_table()
    pos = (x + _REACH) / _STEP
    i = np.minimum(pos.astype(np.int64), values.size - 2)
    t = pos - i
    t2, t3 = t * t, t * t * t
    return (
        (2 * t3 - 3 * t2 + 1) * values[i]
        + (t3 - 2 * t2 + t) * slopes[i]
        + (3 * t2 - 2 * t3) * values[i + 1]
        + (t3 - t2) * slopes[i + 1]
    )


def _norm_pdf(x: float) -> float:
    return math.exp(-0.5 * x * x - _LN_SQRT_2PI)


def norm_isf(q: float) -> float:
    """z with P(Z > z) = q."""
    if not 0.0 <= q <= 1.0:
        raise ValueError(f"probability must be in [0, 1], got {q}")
    if q == 0.5:
        return 0.0
    if q > 0.5:
        return -norm_isf(1.0 - q) if q < 1.0 else -math.inf
    if q == 0.0:
        return math.inf
    # start from the tail expansion, then Newton on log P(Z > z)
    r = -2.0 * math.log(q)
    z = math.sqrt(max(r - math.log(max(r, 1e-300)) - math.log(2 * math.pi), 0.0)) if q < 0.3 else (0.5 - q) * 2.5
    return _newton_log_tail(lambda x: norm_sf(x), lambda x: _norm_pdf(x), q, z, 0.0)


def norm_ppf(p: float) -> float:
    """z with P(Z <= z) = p."""
    if p <= 0.5:
        return -norm_isf(p)
    return norm_isf(1.0 - p)


# --- incomplete beta ---------------------------------------------------------------------


def _lgamma_correction(x: float) -> float:
    """ln Gamma(x) - Stirling's main terms for x >= 10 (Bernoulli-number series)."""
    inv, inv2 = 1.0 / x, 1.0 / (x * x)
    return inv * (
        1 / 12
        - inv2
        * (1 / 360 - inv2 * (1 / 1260 - inv2 * (1 / 1680 - inv2 * (1 / 1188 - inv2 * (691 / 360360 - inv2 / 156)))))
    )


def _lbeta(a: float, b: float) -> float:
    """ln B(a, b) without the cancellation of lgamma(a) + lgamma(b) - lgamma(a + b) at large
    arguments (the split used by Didonato & Morris 1992, algorithm 708)."""
    a, b = min(a, b), max(a, b)
    if b < 10:
        return math.lgamma(a) + math.lgamma(b) - math.lgamma(a + b)
    corr = _lgamma_correction(b) - _lgamma_correction(a + b)
    if a < 10:
        return math.lgamma(a) + corr - (b - 0.5) * math.log1p(a / b) - a * math.log(a + b) + a
    return (
        _LN_SQRT_2PI
        - 0.5 * math.log(b)
        + (a - 0.5) * math.log(a / (a + b))
        + b * math.log1p(-a / (a + b))
        + corr
        + _lgamma_correction(a)
    )


def _beta_fraction(a: float, b: float, x: float) -> float:
    """Continued fraction of I_x(a, b), modified Lentz evaluation."""
    qab, qap, qam = a + b, a + 1.0, a - 1.0
    c, d = 1.0, 1.0 - qab * x / qap
    d = 1.0 / (d if abs(d) > _TINY else _TINY)
    h = d
    for m in range(1, 20000):
        m2 = 2 * m
        for aa in (m * (b - m) * x / ((qam + m2) * (a + m2)), -(a + m) * (qab + m) * x / ((a + m2) * (qap + m2))):
            d = 1.0 + aa * d
            d = 1.0 / (d if abs(d) > _TINY else _TINY)
            c = 1.0 + aa / c
            c = c if abs(c) > _TINY else _TINY
            h *= d * c
        if abs(d * c - 1.0) < _EPS:
            return h
    raise ArithmeticError(f"incomplete beta continued fraction did not converge (a={a}, b={b}, x={x})")


def _beta_direct(a: float, b: float, x: float, y: float) -> float:
    """I_x(a, b) by its continued fraction; y = 1 - x given separately for precision."""
    if x == 0.0:
        return 0.0
    ln_x = math.log(x) if x <= 0.5 else math.log1p(-y)
    ln_y = math.log(y) if y <= 0.5 else math.log1p(-x)
    front = math.exp(a * ln_x + b * ln_y - _lbeta(a, b)) / a
    return front * _beta_fraction(a, b, x)


def _beta_pair(a: float, b: float, x: float, y: float) -> tuple[float, float]:
    """(I_x(a, b), I_y(b, a)) = (lower, upper) with y = 1 - x; the smaller of the two is
    computed directly, so both keep their relative precision."""
    if x <= 0.0:
        return 0.0, 1.0
    if y <= 0.0:
        return 1.0, 0.0
    if x < (a + 1.0) / (a + b + 2.0):
        low = _beta_direct(a, b, x, y)
        return low, 1.0 - low
    up = _beta_direct(b, a, y, x)
    return 1.0 - up, up


# --- Student t ---------------------------------------------------------------------------


def _t_split(t: float, df: float) -> tuple[float, float]:
    """(P(T > |t|), P(0 < T < |t|)): the outer and central parts of a half."""
    t2 = t * t
    if math.isinf(t2):
        x, y = df / abs(t) / abs(t), 1.0
    else:
        x, y = df / (df + t2), t2 / (df + t2)
    outer, inner = _beta_pair(df / 2.0, 0.5, x, y)
    return 0.5 * outer, 0.5 * inner


def _check_df(df: float) -> None:
    if not df > 0:
        raise ValueError(f"degrees of freedom must be > 0, got {df}")


def t_sf(t: float, df: float) -> float:
    """P(T > t) for Student's t with df degrees of freedom (df may be fractional)."""
    _check_df(df)
    if math.isinf(df):
        return norm_sf(t)
    outer, inner = _t_split(t, df)
    return outer if t >= 0 else 0.5 + inner


def t_cdf(t: float, df: float) -> float:
    """P(T <= t) for Student's t with df degrees of freedom."""
    return t_sf(-t, df)


def t_pdf(t: float, df: float) -> float:
    """Density of Student's t at t."""
    return math.exp(-_lbeta(0.5, df / 2.0) - 0.5 * math.log(df) - (df + 1) / 2.0 * math.log1p(t * t / df))


def _newton_log_tail(tail, dens, target: float, x: float, lo: float, sign: float = 1.0) -> float:
    """Solve tail(x) = target for x > lo, tail decreasing (sign 1) or increasing (sign -1),
    by Newton steps on log tail, kept inside a bracket that bisection falls back to."""
    hi = math.inf
    x = max(x, lo + 1e-300) if x > lo else (lo + 1.0 if lo > 0 else 1.0)
    ln_target = math.log(target)
    for _ in range(200):
        value = tail(x)
        if value <= 0.0:
            (hi, lo) = (x, lo) if sign > 0 else (hi, x)
            x = (lo + x) / 2.0 if sign > 0 else 2 * x
            continue
        err = math.log(value) - ln_target
        if (err > 0) == (sign > 0):
            lo = x
        else:
            hi = x
        if err == 0.0:
            return x
        slope = -sign * dens(x) / value
        step = err / slope if slope != 0 else math.inf
        new = x - step
        if not lo < new < hi:
            new = (lo + hi) / 2.0 if math.isfinite(hi) else max(2.0 * x, lo + 1.0)
        if abs(new - x) <= 4e-16 * abs(new):
            return new
        x = new
    raise ArithmeticError(f"quantile search did not converge (target {target})")


@lru_cache(maxsize=4096)
def t_isf(q: float, df: float) -> float:
    """t with P(T > t) = q (cached: intervals ask for the same few quantiles)."""
    _check_df(df)
    if not 0.0 <= q <= 1.0:
        raise ValueError(f"probability must be in [0, 1], got {q}")
    if math.isinf(df):
        return norm_isf(q)
    if q > 0.5:
        return -t_isf(1.0 - q, df)
    if q == 0.5:
        return 0.0
    if q == 0.0:
        return math.inf
    if df == 1.0:  # Cauchy: exact
        return 1.0 / math.tan(math.pi * q)
    dens = lambda x: t_pdf(x, df)
    z = norm_isf(q)
    guess = z + (z**3 + z) / (4 * df) + (5 * z**5 + 16 * z**3 + 3 * z) / (96 * df * df)
    if q < 0.25:
        return _newton_log_tail(lambda x: t_sf(x, df), dens, q, guess, 0.0)
    # near the centre solve P(0 < T < t) = 0.5 - q, which keeps relative precision at small t
    return _newton_log_tail(lambda x: _t_split(x, df)[1], dens, 0.5 - q, guess, 0.0, sign=-1.0)


def t_ppf(p: float, df: float) -> float:
    """t with P(T <= t) = p."""
    if p <= 0.5:
        return -t_isf(p, df)
    return t_isf(1.0 - p, df)


# --- F -----------------------------------------------------------------------------------


def f_sf(f: float, dfn: float, dfd: float) -> float:
    """P(F > f) for Snedecor's F with (dfn, dfd) degrees of freedom."""
    _check_df(dfn)
    _check_df(dfd)
    if f <= 0:
        return 1.0
    if math.isinf(f):
        return 0.0
    scaled = dfn * f
    x, y = dfd / (dfd + scaled), scaled / (dfd + scaled)
    return _beta_pair(dfd / 2.0, dfn / 2.0, x, y)[0]


def _f_pdf(f: float, dfn: float, dfd: float) -> float:
    a, b = dfn / 2.0, dfd / 2.0
    return math.exp(
        a * math.log(dfn / dfd) + (a - 1) * math.log(f) - (a + b) * math.log1p(dfn * f / dfd) - _lbeta(a, b)
    )


def f_isf(q: float, dfn: float, dfd: float) -> float:
    """f with P(F > f) = q, for 0 < q < 1."""
    if not 0.0 < q < 1.0:
        raise ValueError(f"probability must be in (0, 1), got {q}")
    return _newton_log_tail(lambda x: f_sf(x, dfn, dfd), lambda x: _f_pdf(x, dfn, dfd), q, 1.0, 0.0)


# --- quadrature over s / sigma -------------------------------------------------------------


def _log_density_edge(df: float, depth: float, side: float) -> float:
    """u = ln(s/sigma) where the log density has fallen by depth below its mode at u = 0;
    the density of u is proportional to exp(-(df/2)(e^{2u} - 1 - 2u))."""
    lo, hi = (0.0, 10.0) if side > 0 else (-depth - 10.0, 0.0)
    for _ in range(200):
        mid = (lo + hi) / 2.0
        fall = df / 2.0 * (math.expm1(2 * mid) - 2 * mid)
        if (fall > depth) == (side > 0):
            hi = mid
        else:
            lo = mid
    return (lo + hi) / 2.0


@lru_cache(maxsize=8)
def _gauss_legendre(points: int) -> tuple[np.ndarray, np.ndarray]:
    """Gauss-Legendre nodes and weights on [-1, 1] (numpy's; cached, so made read-only)."""
    x, w = np.polynomial.legendre.leggauss(points)
    x.setflags(write=False)
    w.setflags(write=False)
    return x, w


@lru_cache(maxsize=256)
def scaled_chi_nodes(df: float, panels: int = 24, per_panel: int = 8) -> tuple[np.ndarray, np.ndarray]:
    """Nodes s and weights w (summing to 1) with sum(w * g(s)) ~ E[g(S)] for S = sqrt(X/df),
    X chi-squared with df >= 1 degrees of freedom: the law of a sample sd over the true sd.

    Composite Gauss-Legendre in s over the range where the density of ln S is above e^-36 of
    its peak (the mass left out is below 1e-14). df = inf gives the point mass at 1.
    """
    if math.isinf(df):
        return np.ones(1), np.ones(1)
    if not df >= 1:
        raise ValueError(f"degrees of freedom must be >= 1, got {df}")
    lo, hi = math.exp(_log_density_edge(df, 36.0, -1.0)), math.exp(_log_density_edge(df, 36.0, 1.0))
    x, w = _gauss_legendre(per_panel)
    # below s = 1/2 (reached for small df) panels are equal in ln s, where the density's
    # power-law left tail and steep integrands such as Phi(c s) are smooth
    split = max(lo, 0.5)
    s_parts, w_parts = [], []
    log_panels = max(2, math.ceil((math.log(split) - math.log(lo)) / min(0.75, 6.0 / df)))
    for a, b, count, log_scale in ((math.log(lo), math.log(split), log_panels, True), (split, hi, panels, False)):
        if b <= a:
            continue
        edges = np.linspace(a, b, count + 1)
        half = (edges[1:] - edges[:-1])[:, None] / 2.0
        mids = (edges[1:] + edges[:-1])[:, None] / 2.0
        nodes = (mids + half * x[None, :]).ravel()
        weights = (half * w[None, :]).ravel()
        if log_scale:
            nodes = np.exp(nodes)
            weights = weights * nodes
        s_parts.append(nodes)
        w_parts.append(weights)
    s, weight = np.concatenate(s_parts), np.concatenate(w_parts)
    # density of S: 2 (df/2)^(df/2) s^(df-1) exp(-df s^2 / 2) / Gamma(df/2)
    log_dens = (
        math.log(2.0)
        + (df / 2.0) * math.log(df / 2.0)
        - math.lgamma(df / 2.0)
        + (df - 1.0) * np.log(s)
        - df / 2.0 * s * s
    )
    weight = weight * np.exp(log_dens)
    return s, weight / weight.sum()
