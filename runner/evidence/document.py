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
    "RegularizationRow",
    "Row",
]

FORMAT = "recipe-leaderboard"
FORMAT_VERSION = 1


@dataclass(frozen=True)
class Counts:
    """Jobs of a configuration (or of the grid) by state."""

    done: int = 0
    diverged: int = 0
    failed: int = 0
    timeout: int = 0
    pending: int = 0

    @property
    def finished(self) -> int:
        return self.done + self.diverged + self.failed + self.timeout

    @property
    def total(self) -> int:
        return self.finished + self.pending

    def __add__(self, other: Counts) -> Counts:
        return Counts(*(a + b for a, b in zip(dataclasses.astuple(self), dataclasses.astuple(other))))


@dataclass(frozen=True)
class Comparison:
    """A row against the best row: paired over the seeds both finished."""

    diff_mean: float
    ci95: list[float] | None
    t: float
    df: int
    p_value: float
    n_pairs: int
    wilcoxon_p: float | None
    p_holm: float | None = None


@dataclass(frozen=True)
class Flag:
    """A failure mode seen in a configuration's jobs: a stable ``code`` (JSON consumers and
    the legend key on it) and the ``text`` the board prints (e.g. "diverged 2/5")."""

    code: str
    text: str


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
    rank: int | None = None
    vs_best: Comparison | None = None
    top_group: bool | None = None

    @property
    def label(self) -> str:
        """The configuration's level labels in one line ("base" without factors)."""
        return ", ".join(self.labels.values()) or "base"


@dataclass(frozen=True)
class Environment:
    """The environments the stored jobs ran in; more than one means results may not compare."""

    distinct: int
    differs_in: list[str]
    first: dict[str, Any] | None
    recipe_versions: int


@dataclass(frozen=True)
class MatchedDifference:
    """A level against its factor's baseline, over matched configurations and seeds."""

    diff_mean: float
    ci95: list[float] | None
    p_value: float | None
    n_pairs: int
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


@dataclass(frozen=True)
class OneAtATimeRow:
    factor: str
    label: str
    n_pairs: int
    mean: float | None
    diff_mean: float | None
    ci95: list[float] | None
    p_value: float | None


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
    depends: bool


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
    data: list[str]  # data fingerprints
    jobs: Counts
    rows: list[Row]
    ablation: Ablation | None
    environment: Environment
    cautions: list[str]
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
        from runner.evidence.flags import legend  # flags.py builds on this module

        doc["flag_legend"] = {code: {"meaning": m, "try": t} for code, (m, t) in legend(self.rows).items()}
        return doc

    @classmethod
    def from_json(cls, doc: dict[str, Any], source: str | None = None) -> Leaderboard:
        """Read an exported document back; a malformed one is a UserError naming ``source``."""
        try:
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
                data=list(doc["data"]),
                jobs=_counts(doc["jobs"]),
                rows=[_row(r) for r in doc["rows"]],
                ablation=None,
                environment=Environment(**doc["environment"]),
                cautions=list(doc["cautions"]),
                source=source,
            )
        except (KeyError, TypeError, ValueError) as exc:
            raise UserError(
                f"not a complete leaderboard document ({type(exc).__name__}: {exc})",
                where=source,
                hint="Export one with: recipe board RECIPE --format json --out FILE",
            ) from None


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
    vs = raw.get("vs_best")
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
        top_group=raw.get("top_group"),
    )
