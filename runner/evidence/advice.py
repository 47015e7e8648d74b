"""Seeds advice: how many seeds a question needs, from the spread the stored seeds show.

For the best configuration against the runner-up and against each other possibly-best one:
the seeds a two-sided paired t-test at the recipe's level needs to detect the observed gap
with 80% power (power.seeds_to_detect: the noncentral t, with the protocol's variance), the
same at the board's simultaneous level (alpha / (k - 1), Bonferroni over the k - 1 rivals of
the best: the board's verdicts compare all configurations at once), and with a margin the
seeds two one-sided tests need to show the pair within it (Schuirmann 1987). The observed
spread is taken as the true one: advice, not a guarantee.

Before any result is stored, a pilot of n seeds is described by what it could detect: the
smallest paired difference, in units of the per-seed spread of differences, that n seeds
detect with 80% power, and the exact sign-flip test's floor 2/2^n.
"""

from __future__ import annotations

import math
import statistics
from collections.abc import Mapping, Sequence

from runner.evidence.document import Row, SeedsNeeded
from runner.evidence.paired import min_attainable_p
from runner.evidence.power import paired_t_power, seeds_for_equivalence, seeds_to_detect
from runner.evidence.protocols import Resampling

__all__ = ["POWER", "advice_lines", "advise", "detectable_effect", "pilot_lines"]

POWER = 0.8
Units = Mapping[tuple[int, "int | None"], float]


def _seeds(advice, folds: int | None) -> int | None:
    """Advice in units (seed x fold under k-fold validation) back to seeds."""
    if advice.seeds is None:
        return None
    return math.ceil(advice.seeds / folds) if folds else advice.seeds


def _pair(top: Row, row: Row, units: Mapping[str, Units], protocol: Resampling, alpha: float, k: int,
          margin: float) -> SeedsNeeded | None:  # fmt: skip
    shared = sorted(set(units[top.config_id]) & set(units[row.config_id]), key=lambda u: (u[0], u[1] or 0))
    if len({s for s, _ in shared}) < 2:
        return None
    d = [units[row.config_id][u] - units[top.config_id][u] for u in shared]
    diff, sd = statistics.fmean(d), statistics.stdev(d)
    folds = protocol.folds if protocol.kind == "repeated_kfold" else None
    detect = seeds_to_detect(diff, sd, alpha, POWER, protocol)
    joint = seeds_to_detect(diff, sd, alpha / max(1, k - 1), POWER, protocol)
    equiv = seeds_for_equivalence(margin, sd, diff, alpha, POWER, protocol) if margin else None
    return SeedsNeeded(
        config=row.label, versus=top.label, diff=diff, sd=sd, n_seeds=len({s for s, _ in shared}),
        detect=_seeds(detect, folds), detect_simultaneous=_seeds(joint, folds),
        equivalence=_seeds(equiv, folds) if equiv else None, note=detect.note,
    )  # fmt: skip


def advise(rows: Sequence[Row], units: Mapping[str, Units], protocol: Resampling, alpha: float,
           margin: float) -> list[SeedsNeeded]:  # fmt: skip
    """The advice for a ranked board: its top row against the runner-up and every other
    possibly-best row (rows with a verdict only)."""
    judged = [r for r in rows if r.verdict is not None and r.verdict.kind != "no_verdict"]
    if len(judged) < 2:
        return []
    top = judged[0]
    others = [r for i, r in enumerate(judged[1:]) if i == 0 or r.possibly_best]
    if protocol.kind == "repeated_kfold":
        protocol = Resampling.repeated_kfold(protocol.folds, 1)  # n is set per question
    found = [_pair(top, r, units, protocol, alpha, len(judged), margin) for r in others]
    return [f for f in found if f is not None]


def _count(n: int | None) -> str:
    return "no number of seeds" if n is None else f"{n} seeds"


def advice_lines(advice: Sequence[SeedsNeeded], alpha: float, margin: float) -> list[str]:
    """The advice as sentences for the board and `recipe check`: one per pair that more
    seeds could separate, and one line for all the pairs no number of seeds separates."""
    out, never = [], []
    for a in advice:
        if a.detect is None and a.detect_simultaneous is None and not (margin and a.equivalence):
            never.append(a)
            continue
        text = (f"Seeds advice: to separate {a.versus} from {a.config} (gap {a.diff:+.4g}, sd of paired differences "
                f"{a.sd:.3g} over {a.n_seeds} seeds) with {POWER:.0%} power: {_count(a.detect)} for a paired t-test "
                f"at {alpha:g}, {_count(a.detect_simultaneous)} at the board's simultaneous level")  # fmt: skip
        if margin:
            text += f"; {_count(a.equivalence)} to show them within +-{margin:g}"
        out.append(text + ".")
    if never:
        names = "; ".join(a.config for a in never[:4]) + (f"; and {len(never) - 4} more" if len(never) > 4 else "")
        largest = max(abs(a.diff) for a in never)
        why = (never[0].note or "the gaps are too small for the spread").replace(
            "no number of seeds up to", "none up to"
        )
        out.append(f"Seeds advice: no number of seeds separates {never[0].versus} from {len(never)} "
                   f"configuration{'s' if len(never) > 1 else ''} ({names}; gaps up to {largest:.4g}) with "
                   f"{POWER:.0%} power: {why}.")  # fmt: skip
    return out


def detectable_effect(n: int, alpha: float = 0.05, power: float = POWER, protocol: Resampling | None = None) -> float:
    """The smallest paired difference, in units of the sd of per-seed differences, that a
    two-sided paired t-test at ``alpha`` detects with ``power`` using n seeds (inf when
    the protocol's variance floor makes it unreachable)."""
    from runner.evidence.protocols import FIXED

    protocol = protocol or FIXED
    if n < 2:
        return math.inf
    lo, hi = 0.0, 1.0
    while paired_t_power(hi, 1.0, n, alpha, protocol) < power:
        lo, hi = hi, hi * 2.0
        if hi > 1e6:
            return math.inf
    for _ in range(80):
        mid = (lo + hi) / 2.0
        lo, hi = (mid, hi) if paired_t_power(mid, 1.0, n, alpha, protocol) < power else (lo, mid)
    return (lo + hi) / 2.0


def pilot_lines(n: int, alpha: float, protocol: Resampling) -> list[str]:
    """What a pilot of the recipe's n seeds could tell, before anything is stored."""
    effect = detectable_effect(n, alpha, POWER, protocol)
    floor = min_attainable_p(n)
    what = "no difference of any size in" if math.isinf(effect) else f"a paired difference of {effect:.2f} x"
    split = "with the variance of redrawn splits" if protocol.kind != "fixed" else "one fixed split"
    lines = [f"A pilot of {n} seeds: a paired t-test at {alpha:g} detects {what} the sd of per-seed differences "
             f"with {POWER:.0%} power ({split})."]  # fmt: skip
    lines.append(f"The exact sign-flip test cannot give p below 2/2^{n} = {floor:.3g} with {n} seeds"
                 + (f", so no single pair can differ at {alpha:g}." if floor > alpha else "."))  # fmt: skip
    lines.append("Run it, then `recipe check` or `recipe board` say how many seeds the observed spread needs.")
    return lines
