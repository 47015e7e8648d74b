"""Numbers the flags read, computed once from a finished job's curves and final metrics.

Each is scale-free, so one threshold means the same for every metric and dataset, and each
is stored raw in the job's diagnostics: the flags' thresholds act on them later, so changing
a threshold needs no rerun.

- The end of the validation curve (``tail_*``): over the final stretch of a run that used
  its whole epoch budget, a Mann-Kendall test for an upward trend (Mann 1945; Kendall's
  tau against time, which needs no assumption about the noise's size or shape and is not
  moved by one outlying epoch), the Theil-Sen slope (Sen 1968) times the stretch's length
  as a share of the curve's whole range, and whether the best epoch lies in the stretch.
- ``best_epoch_share``: the epoch early stopping chose, as a share of the epoch budget.
- ``loss_rise``: the largest climb of the training loss above its lowest value so far, as
  a share of its first epoch's value: 0 for a curve that only falls; a spike or an
  oscillation shows as a climb, whatever the loss's units.
- ``gap_scaled``: the train-val gap of the monitored metric in units where 1 is the gap
  between a useless and a perfect model: accuracy, f1_macro and r2 as they are; rmse and
  mae divided by the target's std on the training split (the rmse of predicting its mean);
  log_loss divided by ln K (the log-loss of the uniform prediction).
- ``log_loss_bound`` and ``log_loss_ratio``: the largest val log-loss a calibrated
  classifier with the job's val accuracy can have, and the job's log-loss over it (below).
"""

from __future__ import annotations

import math
import statistics
from collections.abc import Sequence
from typing import Any

__all__ = [
    "TAIL_MIN",
    "best_epoch_share",
    "calibration",
    "fano_bound",
    "loss_rise",
    "mann_kendall_up",
    "scaled_gap",
    "tail_trend",
    "theil_sen",
    "upper_error",
]

TAIL_MIN = 5  # the shortest stretch a trend is judged on (a rank test on 4 points is too coarse)


def mann_kendall_up(values: Sequence[float]) -> float:
    """One-sided p-value of an upward trend in ``values`` against their order: the
    Mann-Kendall statistic S = sum over i < j of sign(v_j - v_i), its variance with the
    tie correction (n(n-1)(2n+5) - sum over tied groups t(t-1)(2t+5)) / 18, and the normal
    approximation without continuity correction (as scipy.stats.kendalltau's asymptotic
    method). 1.0 when every value is equal."""
    values = [float(v) for v in values]
    n = len(values)
    s = sum((b > a) - (b < a) for i, a in enumerate(values) for b in values[i + 1 :])
    ties: dict[float, int] = {}
    for v in values:
        ties[v] = ties.get(v, 0) + 1
    var = (n * (n - 1) * (2 * n + 5) - sum(t * (t - 1) * (2 * t + 5) for t in ties.values())) / 18
    if var <= 0:
        return 1.0
    return 0.5 * math.erfc(s / math.sqrt(var) / math.sqrt(2.0))


def theil_sen(values: Sequence[float]) -> float:
    """The median of the slopes between every pair of points (Sen 1968), per epoch."""
    slopes = [(b - a) / (j - i) for i, a in enumerate(values) for j, b in enumerate(values) if j > i]
    return statistics.median(slopes)


def tail_trend(curve: Sequence[float], higher_is_better: bool, budget: int) -> dict[str, Any]:
    """The end of a validation curve: ``tail_epochs`` W = max(5, ceil(epochs / 4)) last
    epochs, ``tail_trend_p`` (one-sided Mann-Kendall p for improvement over them),
    ``tail_gain_share`` (Theil-Sen slope times W - 1, toward better, over the curve's range)
    and ``tail_has_best`` (the best epoch is one of them). All None for a run that stopped
    before its budget (early stopping judged it flat) or is too short to judge."""
    empty = {"tail_epochs": None, "tail_trend_p": None, "tail_gain_share": None, "tail_has_best": None}
    v = [float(x) if higher_is_better else -float(x) for x in curve]
    if len(v) < budget or len(v) < TAIL_MIN or not all(math.isfinite(x) for x in v):
        return empty
    w = max(TAIL_MIN, math.ceil(len(v) / 4))
    tail = v[-w:]
    spread = max(v) - min(v)
    share = theil_sen(tail) * (w - 1) / spread if spread > 0 else 0.0
    best = max(range(len(v)), key=lambda e: (v[e], -e))  # the first epoch reaching the best
    return {
        "tail_epochs": w,
        "tail_trend_p": mann_kendall_up(tail),
        "tail_gain_share": share,
        "tail_has_best": best >= len(v) - w,
    }


def best_epoch_share(best_epoch: int | None, budget: int, patience: int) -> float | None:
    """The epoch early stopping kept, as a share of the epoch budget (None without it)."""
    if patience <= 0 or best_epoch is None or budget <= 0:
        return None
    return best_epoch / budget


def loss_rise(curve: Sequence[float]) -> float | None:
    """The largest climb of a loss curve above its lowest value so far, over its first
    value; None below three epochs. Losses here are >= 0 with 0 the perfect fit, so the
    first epoch's loss is the curve's natural scale (a range, max - min, would not do: on a
    curve that barely moves, noise alone is most of the range). A largest climb, not a sum
    of rises, so that a long run's small epoch-to-epoch noise does not add up."""
    if len(curve) < 3 or not all(math.isfinite(x) for x in curve) or curve[0] <= 0:
        return None
    low, climb = curve[0], 0.0
    for x in curve[1:]:
        low = min(low, x)
        climb = max(climb, x - low)
    return climb / curve[0]


def scaled_gap(gap: float, metric: str, target_std: float | None, classes: int | None) -> float | None:
    """The train-val gap in scale-free units (module docstring); None where the scale is unknown."""
    if metric in ("accuracy", "f1_macro", "r2"):
        return gap
    if metric in ("rmse", "mae"):
        return gap / target_std if target_std else None
    if metric == "log_loss":
        return gap / math.log(classes) if classes and classes > 1 else None
    return None


def upper_error(errors: int, rows: int, level: float = 0.95) -> float:
    """One-sided upper confidence bound of an error rate (Clopper & Pearson 1934): the p
    with P(Binomial(rows, p) <= errors) = 1 - level."""
    if errors >= rows:
        return 1.0
    from runner.evidence.distributions import f_isf  # no scipy in a training process

    # the beta quantile through the F distribution: p = a F / (b + a F), F ~ F(2a, 2b)
    a, b = errors + 1, rows - errors
    f = f_isf(1.0 - level, 2 * a, 2 * b)
    return a * f / (b + a * f)


def fano_bound(error: float, classes: int) -> float:
    """The largest expected log-loss (nats) of a calibrated K-class classifier whose error
    rate is ``error``: by Fano's inequality (Fano 1961; Cover & Thomas, Elements of
    Information Theory, 2.10), H(Y | p(X)) <= h(e) + e ln(K - 1), and a calibrated
    classifier's expected log-loss is exactly H(Y | p(X)). It grows with e up to ln K at
    e = (K - 1) / K."""
    e = min(error, (classes - 1) / classes)
    if e <= 0:
        return 0.0
    h = -e * math.log(e) - (1 - e) * math.log1p(-e)
    return h + e * math.log(classes - 1) if classes > 2 else h


def calibration(accuracy: float, log_loss: float, rows: int, classes: int) -> dict[str, float | None]:
    """``log_loss_bound``: the Fano bound at the 95% upper confidence bound of the val error
    rate (so that a small validation split's luck in its error count does not lower the
    bound); ``log_loss_ratio``: the val log-loss over it. Above 1, no calibrated classifier
    with this accuracy has a log-loss this high in expectation: its probabilities are off,
    most often by confident mistakes (an under-confident model far above chance can exceed
    it too)."""
    if rows <= 0 or classes < 2 or not (math.isfinite(accuracy) and math.isfinite(log_loss)):
        return {"log_loss_bound": None, "log_loss_ratio": None}
    errors = round((1.0 - accuracy) * rows)
    bound = fano_bound(upper_error(errors, rows), classes)
    return {"log_loss_bound": bound, "log_loss_ratio": log_loss / bound if bound > 0 else None}
