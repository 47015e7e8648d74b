"""Flags: what went wrong in a configuration's jobs, from their stored diagnostics.

Thresholds come from the recipe's [diagnostics] table; they act on stored numbers, so
changing them needs no rerun. Each flag has a stable ``code`` (JSON, CSV, the legend) and
an entry in ``LEGEND``: what it means and what to try.

Flags judged job by job (vanishing, exploding, still improving, stopped early, unstable
loss, miscalibrated) fire when at least half of the jobs that can be judged meet the rule;
the others compare the median over jobs with the threshold. Initialization flags
(vanishing, exploding) read every finished job, diverged and timed-out ones included: their
initialization was measured before anything went wrong, and an exploding init is often
why a job diverged. The flags about the end of training read the done jobs only.
"""

from __future__ import annotations

import statistics
from collections.abc import Callable, Iterable
from typing import TYPE_CHECKING, Any

from runner.evidence.document import Flag

if TYPE_CHECKING:
    from runner.evidence.document import Counts, Row
    from runner.recipe.loader import DiagnosticThresholds

__all__ = [
    "AVERAGED",
    "LEGEND",
    "exploding",
    "flags",
    "legend",
    "mean_diagnostics",
    "miscalibrated",
    "still_improving",
    "stopped_early",
    "unstable",
    "vanishing",
]

AVERAGED = (
    "grad_ratio",
    "act_spread",
    "backprop_spread",
    "grad_weight_max",
    "dead_fraction",
    "saturated_fraction",
    "zero_fraction",
    "near_zero_fraction",
    "gap",
    "gap_scaled",
    "tail_gain_share",
    "best_epoch_share",
    "loss_rise",
    "log_loss_ratio",
)

# code -> (what it means, what to try): one line each under the board
LEGEND: dict[str, tuple[str, str]] = {
    "diverged": (
        "the training loss became non-finite or exceeded diverge_factor times its first value",
        "lower train.lr, set train.clip_norm, or use a variance-preserving init",
    ),
    "failed": ("the job raised an error", "see the error with `recipe run -v`; rerun with --retry-failed"),
    "timed_out": ("the job reached its time limit", "raise train.time_limit, or fewer epochs or a smaller model"),
    "vanishing_gradients": (
        "at initialization the signal shrinks across depth (activation std, back-propagated or weight "
        "gradient, below vanishing_below) or every layer's gradient is tiny against its weights",
        "He init for ReLU, Glorot for tanh, fewer layers, batch norm, or ReLU instead of sigmoid",
    ),
    "exploding_gradients": (
        "at initialization the signal grows across depth (above exploding_above) or a layer's "
        "gradient is far larger than its weights",
        "a variance-preserving init or smaller init_scale, train.clip_norm, or batch norm",
    ),
    "dead_units": (
        "most ReLU units are never active on the probe rows at the end",
        "lower train.lr, leaky_relu, He init",
    ),
    "saturated_units": (
        "most sigmoid/tanh units sit at their bounds at the end",
        "standardize the inputs, Glorot init, lower train.lr, or ReLU",
    ),
    "overfitting": (
        "train minus val of the rank metric above gap_above, scale-free (accuracy points; rmse and mae "
        "over the target's std; log-loss over ln K)",
        "L2, dropout or early stopping, a smaller model, or more training rows",
    ),
    "still_improving": (
        "the val metric was still rising over the last quarter of the epochs: it may rank low only "
        "because it stopped too soon",
        "raise train.epochs (or the learning rate) and compare again",
    ),
    "stopped_early": (
        "early stopping kept an epoch within the first early_stop_share of the epoch budget: the score "
        "comes from a network trained few epochs (a high rate, noisy val, or just a generous budget)",
        "lower train.lr or raise train.patience and compare; if the score holds, the budget was generous",
    ),
    "unstable_loss": (
        "the training loss climbed back above its lowest value so far by more than unstable_above of "
        "its first epoch's value (a spike or oscillation)",
        "lower train.lr, a schedule with warm-up or decay, train.clip_norm, or larger batches",
    ),
    "miscalibrated": (
        "val log-loss more than miscalibrated_above times the largest a calibrated classifier with this "
        "val accuracy can have (Fano's inequality): its probabilities are off, most often confident mistakes",
        "if probabilities matter rank by val.log_loss; regularize or stop earlier; calibrate before use",
    ),
}


def mean_diagnostics(diags: list[dict[str, Any]]) -> dict[str, float | None]:
    out = {}
    for name in AVERAGED:
        values = [d[name] for d in diags if isinstance(d.get(name), (int, float))]
        out[name] = statistics.fmean(values) if values else None
    return out


def _median(diags: list[dict[str, Any]], name: str) -> float | None:
    values = [d[name] for d in diags if d.get(name) is not None]
    return statistics.median(values) if values else None


def _beyond(values: Iterable[Any], below: float | None = None, above: float | None = None) -> bool | None:
    """True if any of the numbers is below ``below`` or above ``above``; None if none is known."""
    known = [v for v in values if v is not None]
    if not known:
        return None
    return any((below is not None and v < below) or (above is not None and v > above) for v in known)


def vanishing(d: dict[str, Any], th: DiagnosticThresholds) -> bool | None:
    ratios = (d.get("grad_ratio"), d.get("act_spread"), d.get("backprop_spread"))
    return _any_known(
        _beyond(ratios, below=th.vanishing_below), _beyond([d.get("grad_weight_max")], th.grad_weight_below)
    )


def exploding(d: dict[str, Any], th: DiagnosticThresholds) -> bool | None:
    ratios = (d.get("grad_ratio"), d.get("act_spread"), d.get("backprop_spread"))
    return _any_known(
        _beyond(ratios, above=th.exploding_above), _beyond([d.get("grad_weight_max")], above=th.grad_weight_above)
    )


def _any_known(*results: bool | None) -> bool | None:
    known = [r for r in results if r is not None]
    return any(known) if known else None


def still_improving(d: dict[str, Any], th: DiagnosticThresholds) -> bool | None:
    """A significant upward trend over the last stretch, worth at least ``improving_share``
    of the curve's range, with the best epoch inside the stretch."""
    if d.get("tail_trend_p") is None or d.get("tail_gain_share") is None:
        return None
    return bool(d["tail_trend_p"] < th.trend_p and d["tail_gain_share"] >= th.improving_share and d["tail_has_best"])


def stopped_early(d: dict[str, Any], th: DiagnosticThresholds) -> bool | None:
    share = d.get("best_epoch_share")
    return None if share is None else share <= th.early_stop_share


def unstable(d: dict[str, Any], th: DiagnosticThresholds) -> bool | None:
    rise = d.get("loss_rise")
    return None if rise is None else rise > th.unstable_above


def miscalibrated(d: dict[str, Any], th: DiagnosticThresholds) -> bool | None:
    ratio = d.get("log_loss_ratio")
    return None if ratio is None else ratio > th.miscalibrated_above


Rule = Callable[[dict[str, Any], "DiagnosticThresholds"], "bool | None"]


def _judged(diags: list[dict[str, Any]], rule: Rule, th: DiagnosticThresholds) -> tuple[int, int]:
    """(jobs meeting the rule, jobs it could judge)."""
    verdicts = [v for v in (rule(d, th) for d in diags) if v is not None]
    return sum(verdicts), len(verdicts)


def flags(
    diags: list[dict[str, Any]],
    counts: Counts,
    th: DiagnosticThresholds,
    init_diags: list[dict[str, Any]] | None = None,
) -> list[Flag]:
    """A configuration's flags. ``diags``: its done jobs' diagnostics; ``init_diags``: every
    finished job's (for the initialization flags; default ``diags``)."""
    out = []
    total = counts.finished
    for code, count, word in (("diverged", counts.diverged, "diverged"), ("failed", counts.failed, "failed"),
                              ("timed_out", counts.timeout, "timed out")):  # fmt: skip
        if count:
            out.append(Flag(code, f"{word} {count}/{total}"))
    starts = diags if init_diags is None else init_diags
    for code, text, rule in (("vanishing_gradients", "vanishing gradients", vanishing),
                             ("exploding_gradients", "exploding gradients", exploding)):  # fmt: skip
        k, n = _judged(starts, rule, th)
        if n and 2 * k >= n:
            out.append(Flag(code, text))
    dead = _median(diags, "dead_fraction")
    if dead is not None and dead > th.dead_above:
        out.append(Flag("dead_units", "dead units"))
    sat = _median(diags, "saturated_fraction")
    if sat is not None and sat > th.saturated_above:
        out.append(Flag("saturated_units", "saturated units"))
    gap = _median(diags, "gap_scaled")
    if gap is not None and gap > th.gap_above:
        out.append(Flag("overfitting", "overfitting"))
    for code, text, rule in (("still_improving", "still improving", still_improving),
                             ("stopped_early", "stopped early", stopped_early),
                             ("unstable_loss", "unstable loss", unstable),
                             ("miscalibrated", "miscalibrated", miscalibrated)):  # fmt: skip
        k, n = _judged(diags, rule, th)
        if n and 2 * k >= n:
            out.append(Flag(code, f"{text} {k}/{n}" + _where(code, diags)))
    return out


def _where(code: str, diags: list[dict[str, Any]]) -> str:
    """Stopped early: at what share of the epoch budget (median over jobs), so a reader can
    tell a kept epoch 2 of 100 from epoch 9 of 100."""
    share = _median(diags, "best_epoch_share") if code == "stopped_early" else None
    return "" if share is None else f" (epoch at {share:.0%} of budget)"


def legend(rows: Iterable[Row]) -> dict[str, tuple[str, str]]:
    """The legend entries of the flags present on these rows, in LEGEND's order."""
    present = {f.code for row in rows for f in row.flags}
    return {code: entry for code, entry in LEGEND.items() if code in present}
