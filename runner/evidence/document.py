"""The leaderboard document: typed rows, comparisons and ablation tables, with one
``to_json`` (the versioned ``recipe-leaderboard`` format) and ``from_json`` to read an
exported board back (``recipe diff``).

Every renderer, the diff and the report read these objects, never raw dicts.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from typing import Any

from runner.components.metrics import Goal
from runner.errors import UserError

__all__ = [
    "FORMAT",
    "FORMAT_VERSION",
    "Ablation",
    "Comparison",
    "Counts",
    "Environment",
    "Flag",
    "Interaction",
    "Leaderboard",
    "LevelEffect",
    "MainEffect",
    "MatchedDifference",
    "OneAtATime",
    "OneAtATimeRow",
    "OptimizationRow",
    "RaceEntry",
    "RegularizationRow",
    "Row",
    "SeedsNeeded",
    "Verdict",
]

FORMAT = "recipe-leaderboard"
FORMAT_VERSION = 2


@dataclass(frozen=True)
class Counts:
    """Jobs of a configuration (or of the grid) by state."""

    done: int = 0
    diverged: int = 0
    failed: int = 0
    timeout: int = 0
    pending: int = 0
    skipped: int = 0  # adaptive seeding: jobs the race chose not to train

    @property
    def finished(self) -> int:
        return self.done + self.diverged + self.failed + self.timeout

    @property
    def total(self) -> int:
        return self.finished + self.pending + self.skipped

    def __add__(self, other: Counts) -> Counts:
        return Counts(*(a + b for a, b in zip(dataclasses.astuple(self), dataclasses.astuple(other))))


@dataclass(frozen=True)
class Comparison:
    """A row against the top row, paired over the seeds both finished (supplementary: the
    verdict is the selection-aware ``Verdict``). p_value is the exact sign-flip test on a
    fixed split, the corrected t under resampled splits or folds (``basis`` says which);
    ci95 is the paired interval with the protocol's variance (None without spread)."""

    diff_mean: float
    ci95: list[float] | None
    p_value: float
    basis: str
    n_pairs: int
    p_holm: float | None = None


@dataclass(frozen=True)
class Verdict:
    """Where a configuration stands against the best of the others, from simultaneous
    intervals over all configurations (the possibly-best set, selection-aware).

    kind: "possibly_best" (cannot be ruled out as the best), "behind" (some other
    configuration is better, at the board's level), "within_margin" (within +-margin of the
    best, by two one-sided tests on the simultaneous bounds) or "no_verdict" (``reason``
    says why). advantage: mean minus the best mean of the others, oriented so positive is
    better, in metric units; low/high: its simultaneous bounds (None when not formed)."""

    kind: str
    advantage: float | None
    low: float | None
    high: float | None
    reason: str = ""


@dataclass(frozen=True)
class Flag:
    """A failure mode seen in a configuration's jobs: a stable ``code`` (JSON consumers and
    the legend key on it) and the ``text`` the board prints (e.g. "diverged 2/5")."""

    code: str
    text: str


@dataclass(frozen=True)
class RaceEntry:
    """A configuration in an adaptive run (race.py): the seeds the race gave it, the round
    after which it was dropped (None: still racing, or in at the end) and the look's reason."""

    seeds: int
    dropped_round: int | None
    reason: str

    @property
    def text(self) -> str:
        if self.dropped_round is None:
            return f"{self.seeds} seeds, kept"
        return f"{self.seeds} seeds, dropped after round {self.dropped_round}"


@dataclass(frozen=True)
class Row:
    """One configuration: its levels, its rank metric over seeds and what went wrong."""

    config_id: str
    levels: dict[str, Any]  # path -> value set by the factors
    labels: dict[str, str]  # factor -> level label
    n: int
    mean: float | None
    std: float | None
    ci95: list[float] | None
    per_seed: dict[str, float]  # seed (as text) -> value
    test_mean: float | None
    test_per_seed: dict[str, float]
    counts: Counts
    diagnostics: dict[str, float | None]
    flags: list[Flag]
    complete: bool = True  # no seed diverged, failed or timed out
    rank: int | None = None
    verdict: Verdict | None = None
    vs_best: Comparison | None = None
    best_epoch_median: float | None = None  # under early stopping
    race: RaceEntry | None = None  # adaptive seeding only

    @property
    def possibly_best(self) -> bool | None:
        if self.verdict is None or self.verdict.kind == "no_verdict":
            return None
        return self.verdict.kind in ("possibly_best", "within_margin")

    @property
    def label(self) -> str:
        """The configuration's level labels in one line ("base" without factors)."""
        return ", ".join(self.labels.values()) or "base"


@dataclass(frozen=True)
class SeedsNeeded:
    """Seeds advice for one pair (advice.py): ``config`` against the top row ``versus``,
    from the observed mean gap ``diff`` and sd of paired differences ``sd`` over ``n_seeds``;
    seeds for 80% power at the board's level (``detect``), at its simultaneous level
    (``detect_simultaneous``) and for equivalence within the margin; None: none suffices."""

    config: str
    versus: str
    diff: float
    sd: float
    n_seeds: int
    detect: int | None
    detect_simultaneous: int | None
    equivalence: int | None
    note: str = ""


@dataclass(frozen=True)
class Environment:
    """The environments the stored jobs ran in; more than one means results may not compare."""

    distinct: int
    differs_in: list[str]
    first: dict[str, Any] | None
    recipe_versions: int


@dataclass(frozen=True)
class MatchedDifference:
    """A level against its factor's baseline, over matched configurations (contexts: the
    other factors' levels) and seeds; p_value by ``basis`` (exact sign-flip on a fixed split,
    the corrected t otherwise)."""

    diff_mean: float
    ci95: list[float] | None
    p_value: float | None
    basis: str
    n_contexts: int
    n_seeds: int


@dataclass(frozen=True)
class LevelEffect:
    label: str
    mean: float | None
    ci95: list[float] | None
    n_seeds: int
    diff_vs_baseline: MatchedDifference | None


@dataclass(frozen=True)
class MainEffect:
    factor: str
    baseline: str
    levels: list[LevelEffect]
    contexts_used: int = 0  # contexts in which every level finished
    contexts_total: int = 0
    note: str = ""


@dataclass(frozen=True)
class OneAtATimeRow:
    factor: str
    label: str
    n_pairs: int
    mean: float | None
    diff_mean: float | None
    ci95: list[float] | None
    p_value: float | None
    basis: str = ""


@dataclass(frozen=True)
class OneAtATime:
    baseline: dict[str, str]
    baseline_mean: float | None
    rows: list[OneAtATimeRow]


@dataclass(frozen=True)
class Interaction:
    a: str
    b: str
    means: dict[str, dict[str, float | None]]  # level of b -> level of a -> mean
    best_a_by_b: dict[str, str | None]
    depends: bool  # claimed only when an interaction contrast's simultaneous interval excludes 0
    p_value: float | None = None  # the A x B F test with seeds as blocks
    largest: dict[str, Any] | None = None  # the largest 2 x 2 contrast: estimate, low, high, levels
    note: str = ""


@dataclass(frozen=True)
class RegularizationRow:
    factor: str
    label: str
    n: int
    mean: float | None
    gap: float | None
    zero_fraction: float | None
    near_zero_fraction: float | None


@dataclass(frozen=True)
class OptimizationRow:
    factor: str
    label: str
    n: int
    mean: float | None
    epochs_to_95pct: float | None
    final_train_loss: float | None
    diverged: int


@dataclass(frozen=True)
class Ablation:
    """The ablation tables of a leaderboard (``recipe board --ablation``)."""

    metric: str
    main_effects: list[MainEffect]
    one_at_a_time: OneAtATime | None
    interactions: list[Interaction]
    regularization: list[RegularizationRow]
    optimization: list[OptimizationRow]
    protocol: str = "fixed"  # the validation protocol behind the intervals and p-values

    def to_json(self) -> dict[str, Any]:
        return _plain(self)


@dataclass(frozen=True)
class Leaderboard:
    """The whole board: what was ranked, on what, and every configuration's row."""

    recipe: str
    recipe_hash: str
    description: str
    metric: str  # e.g. "val.accuracy"
    goal: Goal
    test_metric: str
    task: str
    seeds: list[int]
    factors: list[dict[str, Any]]  # name, paths, levels (labels)
    base_settings: dict[str, Any]
    data: dict[str, list[str]]  # fingerprints (the data), test_fingerprints (the test rows)
    protocol: dict[str, Any]  # validation, n_val, n_train, folds, test_seed, variance
    evidence: dict[str, Any]  # alpha, margin, method, matched seeds, critical constant, ...
    monitor: str  # the metric early stopping watched (the recipe's rank_by)
    jobs: Counts
    rows: list[Row]
    ablation: Ablation | None
    environment: Environment
    cautions: list[str]
    race: dict[str, Any] | None = None  # adaptive seeding: the plan, the rounds and why it ended
    advice: list[SeedsNeeded] = field(default_factory=list)  # seeds the top pairs need
    source: str | None = field(default=None, compare=False)  # where it was read from (diff)

    @property
    def factor_names(self) -> list[str]:
        return [f["name"] for f in self.factors]

    def to_json(self) -> dict[str, Any]:
        """The ``recipe-leaderboard`` document (plain JSON types)."""
        doc: dict[str, Any] = {"format": FORMAT, "version": FORMAT_VERSION}
        for f in dataclasses.fields(self):
            if f.name == "source":
                continue
            doc[f.name] = _plain(getattr(self, f.name))
        doc["jobs"]["total"] = self.jobs.total
        for row, raw in zip(self.rows, doc["rows"]):
            raw["possibly_best"] = row.possibly_best
        from runner.evidence.flags import legend  # flags.py builds on this module

        doc["flag_legend"] = {code: {"meaning": m, "try": t} for code, (m, t) in legend(self.rows).items()}
        return doc

    @classmethod
    def from_json(cls, doc: dict[str, Any], source: str | None = None) -> Leaderboard:
        """Read an exported document back (version 1 documents read as far as they go: no
        protocol, so a diff against one cannot pair by seed); a malformed one is a UserError
        naming ``source``."""
        try:
            if doc.get("version") == 1:
                doc = _upgrade_v1(doc)
            return cls(
                recipe=doc["recipe"],
                recipe_hash=doc["recipe_hash"],
                description=doc.get("description", ""),
                metric=doc["metric"],
                goal=Goal(doc["goal"]),
                test_metric=doc["test_metric"],
                task=doc["task"],
                seeds=list(doc["seeds"]),
                factors=list(doc["factors"]),
                base_settings=dict(doc["base_settings"]),
                data=dict(doc["data"]),
                protocol=dict(doc["protocol"]),
                evidence=dict(doc["evidence"]),
                monitor=doc["monitor"],
                jobs=_counts(doc["jobs"]),
                rows=[_row(r) for r in doc["rows"]],
                ablation=None,
                environment=Environment(**doc["environment"]),
                cautions=list(doc["cautions"]),
                race=doc.get("race"),
                advice=[SeedsNeeded(**a) for a in doc.get("advice", [])],
                source=source,
            )
        except (KeyError, TypeError, ValueError) as exc:
            raise UserError(
                f"not a complete leaderboard document ({type(exc).__name__}: {exc})",
                where=source,
                hint="Export one with: recipe board RECIPE --format json --out FILE",
            ) from None


def _upgrade_v1(doc: dict[str, Any]) -> dict[str, Any]:
    """A version-1 document in version 2's shape: what it lacks stays empty."""
    rows = [{**{k: v for k, v in r.items() if k not in ("vs_best", "top_group")},
             "flags": [{"code": "unknown", "text": f} if isinstance(f, str) else f for f in r["flags"]]}
            for r in doc["rows"]]  # fmt: skip
    return {**doc, "data": {"fingerprints": list(doc["data"]), "test_fingerprints": []}, "protocol": {},
            "evidence": {}, "monitor": doc["metric"].split(".", 1)[1], "rows": rows}  # fmt: skip


def _plain(value: Any) -> Any:
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return {f.name: _plain(getattr(value, f.name)) for f in dataclasses.fields(value)}
    if isinstance(value, Goal):
        return value.value
    if isinstance(value, dict):
        return {k: _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    return value


def _counts(raw: dict[str, int]) -> Counts:
    return Counts(**{f.name: raw.get(f.name, 0) for f in dataclasses.fields(Counts)})


def _row(raw: dict[str, Any]) -> Row:
    vs, verdict = raw.get("vs_best"), raw.get("verdict")
    return Row(
        config_id=raw["config_id"],
        levels=raw["levels"],
        labels=raw["labels"],
        n=raw["n"],
        mean=raw["mean"],
        std=raw["std"],
        ci95=raw["ci95"],
        per_seed=raw["per_seed"],
        test_mean=raw["test_mean"],
        test_per_seed=raw["test_per_seed"],
        counts=_counts(raw["counts"]),
        diagnostics=raw["diagnostics"],
        flags=[Flag(**f) for f in raw["flags"]],
        rank=raw.get("rank"),
        vs_best=Comparison(**vs) if vs else None,
        verdict=Verdict(**verdict) if verdict else None,
        complete=raw.get("complete", True),
        best_epoch_median=raw.get("best_epoch_median"),
        race=RaceEntry(**raw["race"]) if raw.get("race") else None,
    )
