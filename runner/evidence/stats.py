"""Statistics across seeds: Student-t intervals, paired and Welch tests, Holm's correction.

The formulas are written out here; tests check them against scipy.stats and statsmodels.
The t distribution comes from runner.evidence.distributions, so importing this module does
not import scipy.stats (slow to import); only the Wilcoxon helper imports it, when called.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from runner.evidence.distributions import t_ppf, t_sf

__all__ = ["holm", "paired", "summarize", "t_interval", "welch", "wilcoxon_p"]


def t_interval(values: Sequence[float], level: float = 0.95):
    """(mean, sd with ddof 1, (low, high)) of a Student-t interval; sd and interval are None
    when fewer than two values."""
    x = np.asarray(values, dtype=float)
    n = len(x)
    if n == 0:
        return None, None, None
    mean = float(x.mean())
    if n < 2:
        return mean, None, None
    sd = float(x.std(ddof=1))
    half = t_ppf(0.5 + level / 2, n - 1) * sd / math.sqrt(n)
    return mean, sd, (mean - half, mean + half)


def summarize(values: Sequence[float]) -> dict:
    mean, sd, ci = t_interval(values)
    return {"n": len(values), "mean": mean, "std": sd, "ci95": list(ci) if ci else None}


def paired(a: Sequence[float], b: Sequence[float]) -> dict | None:
    """Paired t-test of a - b (Student 1908): t = mean(d) / (sd(d) / sqrt(n)), df = n - 1.

    Returns diff_mean, ci95, t, df, p_value; None with fewer than two pairs. Identical
    vectors give p = 1 (no evidence of a difference), not NaN.
    """
    d = np.asarray(a, dtype=float) - np.asarray(b, dtype=float)
    n = len(d)
    if n < 2:
        return None
    mean, sd, ci = t_interval(d)
    if sd == 0:
        p = 1.0 if mean == 0 else 0.0
        t = 0.0 if mean == 0 else math.copysign(math.inf, mean)
    else:
        t = mean / (sd / math.sqrt(n))
        p = 2 * t_sf(abs(t), n - 1)
    return {"diff_mean": mean, "ci95": list(ci), "t": t, "df": n - 1, "p_value": p}


def welch(new: Sequence[float], old: Sequence[float]) -> dict | None:
    """Welch's unequal-variance t-test of mean(new) - mean(old) (Welch 1947), with the
    Welch-Satterthwaite degrees of freedom and a 95% interval. None when either side has
    fewer than two values."""
    x, y = np.asarray(new, dtype=float), np.asarray(old, dtype=float)
    if len(x) < 2 or len(y) < 2:
        return None
    vx, vy = x.var(ddof=1) / len(x), y.var(ddof=1) / len(y)
    diff = float(x.mean() - y.mean())
    se = math.sqrt(vx + vy)
    if se == 0:
        return {
            "diff_mean": diff,
            "ci95": [diff, diff],
            "t": 0.0 if diff == 0 else math.copysign(math.inf, diff),
            "df": float(len(x) + len(y) - 2),
            "p_value": 1.0 if diff == 0 else 0.0,
        }
    df = (vx + vy) ** 2 / (vx**2 / (len(x) - 1) + vy**2 / (len(y) - 1))
    t = diff / se
    half = t_ppf(0.975, df) * se
    return {
        "diff_mean": diff,
        "ci95": [diff - half, diff + half],
        "t": t,
        "df": float(df),
        "p_value": 2 * t_sf(abs(t), df),
    }


def holm(pvalues: Sequence[float]) -> list[float]:
    """Holm 1979 step-down adjusted p-values: sort ascending, p_(i) * (m - i + 1), running
    maximum, capped at 1, returned in the input order."""
    p = np.asarray(pvalues, dtype=float)
    m = len(p)
    order = np.argsort(p, kind="stable")
    adjusted = np.empty(m)
    running = 0.0
    for rank, i in enumerate(order):
        running = max(running, min(1.0, (m - rank) * p[i]))
        adjusted[i] = running
    return adjusted.tolist()


def wilcoxon_p(a: Sequence[float], b: Sequence[float]) -> float | None:
    """Two-sided Wilcoxon signed-rank p-value of a - b (exact for small n, scipy.stats).
    With n pairs it can never go below 2 / 2**n (0.0625 for 5 seeds)."""
    d = np.asarray(a, dtype=float) - np.asarray(b, dtype=float)
    if len(d) < 2:
        return None
    if np.all(d == 0):
        return 1.0
    from scipy import stats as _st  # slow to import: only when a Wilcoxon p is asked for

    return float(_st.wilcoxon(d, zero_method="wilcox", alternative="two-sided").pvalue)
