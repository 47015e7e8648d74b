"""Critical constants for simultaneous comparisons, computed by 2-D quadrature: Dunnett's
one-sided many-to-one constant and the studentized range quantile (Tukey).

With m comparisons of equal-sized groups the statistics are equicorrelated t variables with
correlation 1/2. Writing Z_i = (U_i + U_0) / sqrt(2) with independent standard normals
(the common-factor form), P(max_i Z_i <= d S) = E[Phi(sqrt(2) d S - U_0)^m] where S is the
sample sd over the true sd (Dunnett 1955). The expectation is a Gauss-Legendre sum over
U_0 and over S (``scaled_chi_nodes``); d is found by safeguarded Newton steps. The range of
k means has P(R <= q S) = E[k (Phi(U) - Phi(U - q S))^(k-1)] with U standard normal (the
density of the largest mean times the chance the others lie within q of it). Results are
cached: a board asks for the same (m, df, alpha) many times.
"""

from __future__ import annotations

import math
from functools import lru_cache

import numpy as np

from runner.evidence.distributions import norm_cdf_array, scaled_chi_nodes, t_isf

__all__ = ["dunnett_cdf", "dunnett_one_sided", "range_cdf", "range_quantile"]


@lru_cache(maxsize=1)
def _normal_nodes(panels: int = 16, per_panel: int = 8, reach: float = 9.0):
    x, w = np.polynomial.legendre.leggauss(per_panel)
    edges = np.linspace(-reach, reach, panels + 1)
    half = (edges[1:] - edges[:-1])[:, None] / 2.0
    mids = (edges[1:] + edges[:-1])[:, None] / 2.0
    u = (mids + half * x[None, :]).ravel()
    weight = (half * w[None, :]).ravel() * np.exp(-0.5 * u * u) / math.sqrt(2 * math.pi)
    return u, weight / weight.sum()


def _cdf_and_slope(d: float, m: int, df: float) -> tuple[float, float]:
    s, ws = scaled_chi_nodes(df)
    u, wu = _normal_nodes()
    arg = math.sqrt(2.0) * d * s[:, None] - u[None, :]
    phi_cdf = norm_cdf_array(arg)
    power = phi_cdf ** (m - 1)
    inner = ws[:, None] * wu[None, :]
    value = float(np.sum(inner * power * phi_cdf))
    dens = np.exp(-0.5 * arg * arg) / math.sqrt(2 * math.pi)
    slope = float(np.sum(inner * m * power * dens * math.sqrt(2.0) * s[:, None]))
    return value, slope


def dunnett_cdf(d: float, comparisons: int, df: float) -> float:
    """P(max of ``comparisons`` equicorrelated (rho = 1/2) t statistics <= d), df degrees of
    freedom (math.inf for known variance). At d = 0 it is 1/(comparisons + 1) exactly."""
    if comparisons < 1:
        raise ValueError(f"comparisons must be >= 1, got {comparisons}")
    return _cdf_and_slope(d, comparisons, df)[0]


@lru_cache(maxsize=4096)
def dunnett_one_sided(comparisons: int, df: float, alpha: float = 0.05) -> float:
    """One-sided Dunnett constant d: P(max_i T_i <= d) = 1 - alpha for ``comparisons``
    many-to-one comparisons with equal group sizes (correlation 1/2), df degrees of freedom.

    Bracketed between the single-comparison t quantile (Slepian's inequality) and the
    Bonferroni one; relative accuracy about 1e-9 for df >= 2.
    """
    if comparisons < 1:
        raise ValueError(f"comparisons must be >= 1, got {comparisons}")
    if not 0 < alpha < 1:
        raise ValueError(f"alpha must be in (0, 1), got {alpha}")
    lo, hi = t_isf(alpha, df), t_isf(alpha / comparisons, df)
    if comparisons == 1:
        return lo
    d = lo + 0.75 * (hi - lo)
    target = 1.0 - alpha
    for _ in range(100):
        value, slope = _cdf_and_slope(d, comparisons, df)
        if value < target:
            lo = d
        else:
            hi = d
        new = d - (value - target) / slope if slope > 0 else (lo + hi) / 2.0
        if not lo < new < hi:
            new = (lo + hi) / 2.0
        if abs(new - d) <= 1e-12 * d:
            return new
        d = new
    raise ArithmeticError(f"Dunnett constant did not converge (m={comparisons}, df={df}, alpha={alpha})")


def _range_and_slope(q: float, k: int, df: float) -> tuple[float, float]:
    s, ws = scaled_chi_nodes(df)
    u, wu = _normal_nodes()
    arg = u[None, :] - q * s[:, None]
    inside = norm_cdf_array(u)[None, :] - norm_cdf_array(arg)
    power = inside ** (k - 2)
    inner = ws[:, None] * wu[None, :]
    value = float(np.sum(inner * k * power * inside))
    dens = np.exp(-0.5 * arg * arg) / math.sqrt(2 * math.pi)
    slope = float(np.sum(inner * k * (k - 1) * power * dens * s[:, None]))
    return value, slope


def range_cdf(q: float, k: int, df: float) -> float:
    """P(studentized range of k means <= q) with df degrees of freedom (math.inf: known sd)."""
    if k < 2:
        raise ValueError(f"the range needs k >= 2 means, got {k}")
    return _range_and_slope(q, k, df)[0] if q > 0 else 0.0


@lru_cache(maxsize=4096)
def range_quantile(k: int, df: float, alpha: float = 0.05) -> float:
    """Upper-alpha point q of the studentized range of k means (Tukey 1953): all pairwise
    |(m_i - m_j) - (mu_i - mu_j)| <= q s / sqrt(n) hold together with probability 1 - alpha.

    Bracketed between the two-mean value sqrt(2) t_{alpha/2} and the Bonferroni one over the
    k(k-1)/2 pairs; relative accuracy about 1e-9 for df >= 2.
    """
    if k < 2:
        raise ValueError(f"the range needs k >= 2 means, got {k}")
    if not 0 < alpha < 1:
        raise ValueError(f"alpha must be in (0, 1), got {alpha}")
    lo = math.sqrt(2.0) * t_isf(alpha / 2.0, df)
    if k == 2:
        return lo
    hi = math.sqrt(2.0) * t_isf(alpha / (k * (k - 1)), df)
    q = lo + 0.75 * (hi - lo)
    target = 1.0 - alpha
    for _ in range(100):
        value, slope = _range_and_slope(q, k, df)
        if value < target:
            lo = q
        else:
            hi = q
        new = q - (value - target) / slope if slope > 0 else (lo + hi) / 2.0
        if not lo < new < hi:
            new = (lo + hi) / 2.0
        if abs(new - q) <= 1e-12 * q:
            return new
        q = new
    raise ArithmeticError(f"studentized range quantile did not converge (k={k}, df={df}, alpha={alpha})")
