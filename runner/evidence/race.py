"""Seeds on demand: race the configurations, dropping those shown behind the best.

Racing for model selection (Maron & Moore 1994) and F-Race (Birattari et al. 2002) give every
candidate a few evaluations, drop the candidates shown worse at each look, and spend further
evaluations only on those still in the race. Here the look is the board's own rule: Hsu's
constrained multiple comparisons with the best (Hsu 1996; ``selection.possibly_best``, seeds
as blocks, with the validation protocol's variance), so a configuration is dropped exactly
when a board of the seeds so far would put it behind the best.

Rounds: round 1 gives every configuration the recipe's first ``first_seeds`` seeds; each later
round gives every configuration still in the race the next seed of the list. A look follows
each round. The race ends after a look when one configuration is left, when every remaining
one is within +-margin of the best of the others ([verdicts] margin), when the seeds list is
used up, or when the next round would pass the job budget.

Error control of repeated looks: at most L = len(seeds) - first_seeds + 1 looks can be made,
one after each round. Every look uses level alpha / L, a Bonferroni split fixed before the
race starts (it does not depend on how the race goes), and its critical constant covers all
k configurations of the grid, not only those left, so dropping some never makes the later
comparisons less strict. By Boole's inequality the chance that a truly best configuration is
dropped at some look, or left out of the last look's possibly-best set, is at most
L * alpha / L = alpha. The board's verdicts of a raced grid are the looks' decisions;
bench/adaptive.py measures the rate through these functions.

A configuration with a seed that diverged, failed or timed out is dropped at the look after
that round: the board never ranks a configuration on its surviving seeds, so more seeds could
not make it a candidate.

Everything here is a pure function of the finished jobs' values, so a race replayed from a
store decides what the uninterrupted race decided.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass

import numpy as np

from runner.evidence.protocols import Resampling
from runner.evidence.selection import possibly_best

__all__ = ["Decision", "Look", "RacePlan", "RaceState", "advance", "look"]

Unit = tuple[int, "int | None"]
Values = Mapping[str, Mapping[Unit, float]]  # config id -> (seed, fold) -> rank metric (done jobs)
Finished = Mapping[str, set]  # config id -> (seed, fold) units with a stored result of any status

ONE_LEFT = "one configuration left"
SEEDS_USED = "the seeds list is used up"
BUDGET = "the next round would pass the job budget (adaptive.max_jobs)"
NONE_LEFT = "no configuration left whose seeds all finished"


@dataclass(frozen=True, slots=True)
class RacePlan:
    """What decides a race: the configurations (ids in grid order), the seeds list, the first
    round's size, the metric and its goal, the level, the margin (0: none), the job budget
    (0: none) and the jobs per seed (the folds under k-fold validation, else 1)."""

    configs: tuple[str, ...]
    seeds: tuple[int, ...]
    first_seeds: int
    metric: str
    goal: str
    alpha: float
    margin: float = 0.0
    max_jobs: int = 0
    folds: int | None = None

    def __post_init__(self) -> None:
        if not 2 <= self.first_seeds < len(self.seeds):
            raise ValueError(f"first_seeds must be from 2 to {len(self.seeds) - 1}, got {self.first_seeds}")

    @property
    def looks(self) -> int:
        """L: the most looks the race can make (one after each round)."""
        return len(self.seeds) - self.first_seeds + 1

    @property
    def alpha_look(self) -> float:
        """Each look's level: alpha split evenly over the L planned looks (Bonferroni)."""
        return self.alpha / self.looks

    @property
    def jobs_per_seed(self) -> int:
        return self.folds or 1

    @property
    def full_jobs(self) -> int:
        """The jobs of the full grid: every configuration, every seed."""
        return len(self.configs) * len(self.seeds) * self.jobs_per_seed

    def round_seeds(self, round_: int) -> tuple[int, ...]:
        """The seeds handed out in round ``round_`` (1-based)."""
        if round_ == 1:
            return self.seeds[: self.first_seeds]
        return (self.seeds[self.first_seeds + round_ - 2],)

    def seeds_after(self, round_: int) -> tuple[int, ...]:
        """The seeds every configuration still racing has after round ``round_``."""
        return self.seeds[: self.first_seeds + round_ - 1]

    def units(self, seeds: Sequence[int]) -> list[Unit]:
        folds: list[int | None] = list(range(self.folds)) if self.folds else [None]
        return [(s, f) for s in seeds for f in folds]

    def key(self) -> str:
        """The race's identity in the store: a change to anything that decides it starts
        another race (which reuses every stored job)."""
        text = json.dumps(asdict(self), sort_keys=True, separators=(",", ":"))
        return hashlib.sha256(text.encode()).hexdigest()[:16]


@dataclass(frozen=True, slots=True)
class Decision:
    """One configuration at one look: kept in the race or dropped, and why. advantage: its
    mean minus the best mean of the others (positive is better); low/high: the simultaneous
    bounds of that gap at the look's level (high < 0 for a dropped row: the best of the
    others is ahead by at least -high). None when no interval was formed."""

    config_id: str
    kept: bool
    reason: str
    advantage: float | None = None
    low: float | None = None
    high: float | None = None
    within_margin: bool = False  # both bounds inside +-margin (two one-sided tests)


@dataclass(frozen=True, slots=True)
class Look:
    """The look after round ``round``: each configuration still racing had ``seeds`` seeds;
    ``stop`` says why the race ended here (None: it goes on). critical, half_width,
    residual_sd and basis describe the simultaneous intervals (as on the board)."""

    round: int
    seeds: int
    alpha: float
    decisions: tuple[Decision, ...]
    stop: str | None
    critical: float | None = None
    half_width: float | None = None
    residual_sd: float | None = None
    basis: str = ""

    @property
    def kept(self) -> tuple[str, ...]:
        return tuple(d.config_id for d in self.decisions if d.kept)

    def to_record(self) -> dict:
        """Plain JSON types, for the store."""
        return {**asdict(self), "decisions": [asdict(d) for d in self.decisions]}

    @classmethod
    def from_record(cls, record: Mapping) -> Look:
        decisions = tuple(Decision(**d) for d in record["decisions"])
        return cls(**{**record, "decisions": decisions})


@dataclass(frozen=True)
class RaceState:
    """Where a race stands: its looks so far, the configurations still racing, and per
    configuration the seeds the next round needs that have no stored result (empty when the
    race has ended)."""

    plan: RacePlan
    looks: tuple[Look, ...]
    alive: tuple[str, ...]
    wanted: dict[str, tuple[int, ...]]

    @property
    def finished(self) -> bool:
        return bool(self.looks) and self.looks[-1].stop is not None

    @property
    def stop(self) -> str | None:
        return self.looks[-1].stop if self.looks else None

    @property
    def round(self) -> int:
        """The round being run (or the last one, once the race has ended)."""
        return len(self.looks) + (0 if self.finished else 1)

    def dropped_at(self, config_id: str) -> Look | None:
        for lk in self.looks:
            for d in lk.decisions:
                if d.config_id == config_id and not d.kept:
                    return lk
        return None

    def seeds_given(self, config_id: str) -> int:
        """Seeds the race has handed this configuration (its last round's included)."""
        dropped = self.dropped_at(config_id)
        if dropped is not None:
            return dropped.seeds
        return len(self.plan.seeds_after(self.round))

    def jobs_used(self) -> int:
        """Jobs in the rounds handed out so far (stored before the race or trained by it)."""
        per = self.plan.jobs_per_seed
        used = sum(len(lk.decisions) * len(self.plan.round_seeds(lk.round)) * per for lk in self.looks)
        if not self.finished:
            used += len(self.alive) * len(self.plan.round_seeds(self.round)) * per
        return used


def _other_stop(plan: RacePlan, round_: int, kept: int, used: int) -> str | None:
    """Why the race ends after this look when no comparison ended it."""
    if round_ >= plan.looks:
        return SEEDS_USED
    if plan.max_jobs and used + kept * plan.jobs_per_seed > plan.max_jobs:
        return BUDGET
    return None


def look(plan: RacePlan, round_: int, values: Values, alive: Sequence[str], protocol: Resampling,
         used: int) -> Look:  # fmt: skip
    """The look after round ``round_`` over the configurations ``alive`` (in grid order), each
    with every unit of ``plan.seeds_after(round_)`` finished; ``used``: the jobs of the rounds
    so far (for the budget)."""
    seeds = plan.seeds_after(round_)
    units = plan.units(seeds)
    alpha = plan.alpha_look
    broken = [c for c in alive if any(u not in values[c] for u in units)]
    candidates = [c for c in alive if c not in broken]
    decisions = {c: Decision(c, False, "dropped: a seed diverged, failed or timed out (never ranked on its "
                                       "surviving seeds)") for c in broken}  # fmt: skip
    stats: dict = {}
    stop = None
    if len(candidates) >= 2:
        if protocol.kind == "repeated_kfold":
            protocol = Resampling.repeated_kfold(protocol.folds, len(seeds))
        y = np.array([[values[c][u] for u in units] for c in candidates])
        best = possibly_best(y, plan.goal, alpha, protocol, margin=plan.margin or None, family=len(plan.configs))
        w = best.half_width
        for i, c in enumerate(candidates):
            adv = best.advantage[i]
            low, high = (None, None) if w is None or not np.isfinite(w) else (adv - w, adv + w)
            within = bool(best.within_margin[i]) if best.within_margin is not None else False
            if best.possibly_best[i]:
                decisions[c] = Decision(c, True, "kept: cannot be ruled out as the best", adv, low, high, within)
            else:
                why = f"dropped: behind the best of the others by at least {-(adv + w):.4g}"
                decisions[c] = Decision(c, False, why, adv, low, high, within)
        kept = [i for i, c in enumerate(candidates) if best.possibly_best[i]]
        stats = {"critical": best.critical, "half_width": _finite(w), "residual_sd": best.residual_sd,
                 "basis": best.basis}  # fmt: skip
        if len(kept) == 1:
            stop = ONE_LEFT
        elif best.within_margin is not None and all(best.within_margin[i] for i in kept):
            stop = f"every remaining configuration is within +-{plan.margin:g} of the best of the others"
    elif len(candidates) == 1:
        only = "kept: the only configuration whose seeds all finished"
        decisions[candidates[0]] = Decision(candidates[0], True, only)
        stop = ONE_LEFT
    else:
        stop = NONE_LEFT
    n_kept = sum(d.kept for d in decisions.values())
    stop = stop or _other_stop(plan, round_, n_kept, used)
    ordered = tuple(decisions[c] for c in alive)
    return Look(round_, len(seeds), alpha, ordered, stop, **stats)


def _finite(x: float | None) -> float | None:
    return None if x is None or not np.isfinite(x) else float(x)


def advance(plan: RacePlan, values: Values, finished: Finished, protocol: Resampling,
            stored: Sequence[Look] = ()) -> RaceState:  # fmt: skip
    """The race after the ``stored`` looks, carried on as far as the finished jobs allow: a
    look is made after every round whose jobs have all finished. The state names the jobs
    the next round still needs (none once the race has ended)."""
    looks = list(stored)
    alive = tuple(c for c in plan.configs if all(c in lk.kept for lk in looks))
    while not (looks and looks[-1].stop):
        round_ = len(looks) + 1
        need = plan.units(plan.round_seeds(round_))
        wanted = {c: tuple(sorted({s for s, f in need if (s, f) not in finished.get(c, set())})) for c in alive}
        wanted = {c: s for c, s in wanted.items() if s}
        state = RaceState(plan, tuple(looks), alive, wanted)
        if wanted:
            return state
        lk = look(plan, round_, values, alive, protocol, state.jobs_used())
        looks.append(lk)
        alive = lk.kept
    return RaceState(plan, tuple(looks), alive, {})
