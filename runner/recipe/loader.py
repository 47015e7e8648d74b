"""Load a TOML recipe and validate it, once, into a frozen ``Recipe``.

Everything downstream takes the Recipe; nothing reads raw TOML again. Checks that need the
data (the target column, the task, the rank metric) happen in ``grid.expand``.
"""

from __future__ import annotations

import copy
import hashlib
import re
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from types import MappingProxyType
from typing import Any

import tomli

from runner.components.metrics import METRICS
from runner.errors import RecipeError, UserError
from runner.files import read_bounded
from runner.recipe.constraints import (
    Choice,
    Either,
    Integer,
    Invalid,
    Param,
    Pattern,
    Real,
    Text,
    suggest,
    validate_table,
)
from runner.recipe.factors import Factor, parse_baseline, parse_exclude, parse_factors
from runner.recipe.locate import line_of
from runner.recipe.settings import SECTIONS, Settings

__all__ = [
    "AdaptiveSettings",
    "DiagnosticThresholds",
    "Factor",
    "Recipe",
    "RunSettings",
    "TrackingSettings",
    "VerdictSettings",
    "check_rank_by",
    "load_recipe",
    "parse_recipe",
    "resolve",
]

MAX_RECIPE_BYTES = 1 << 20  # a recipe is a short text; this bound stops /dev/zero and its kind

TOP_LEVEL = (
    "adaptive",
    "baseline",
    "data",
    "description",
    "diagnostics",
    "exclude",
    "factors",
    "model",
    "name",
    "rank_by",
    "run",
    "seeds",
    "tracking",
    "train",
    "verdicts",
)

# [run]: where and how wide the grid runs; command-line options override it. Not part of any
# job's identity: the same job gives the same numbers wherever it runs.
RUN = {
    "on": Param(
        Either((Choice(("dask-local", "local")), Pattern(r"dask://[^\s/]+:\d+", "dask://HOST:PORT"))),
        "local",
        'where jobs run: "local", "dask-local" or "dask://HOST:PORT"',
    ),
    "workers": Param(Integer(0, 4096), 0, "worker processes (0 = chosen by the tool: the number of cores)"),
    "keep_weights": Param(
        Choice(("all", "none", "possibly_best")),
        "possibly_best",
        "trained weights kept in the store: every done job's, only the possibly-best "
        "configurations' (the rest dropped when a run ends), or none (export retrains)",
    ),
}
TRACKING = {
    "mlflow": Param(Text(), None, "MLflow tracking URI to log every finished job to, e.g. sqlite:///mlflow.db"),
}

# Thresholds for the leaderboard's flags. They act on stored numbers, so changing them
# needs no rerun and they are not part of a job's identity.
DIAGNOSTICS = {
    "vanishing_below": Param(
        Real(0, None, low_open=True),
        1e-3,
        "flag vanishing when a depth ratio at init (activation std, back-propagated or weight gradient) is below this",
    ),
    "exploding_above": Param(
        Real(0, None, low_open=True), 1e3, "flag exploding when a depth ratio at init is above this"
    ),
    "grad_weight_below": Param(
        Real(0, None, low_open=True), 1e-6, "flag vanishing when every layer's |grad W| / |W| at init is below this"
    ),
    "grad_weight_above": Param(
        Real(0, None, low_open=True), 1e2, "flag exploding when some layer's |grad W| / |W| at init is above this"
    ),
    "dead_above": Param(Real(0, 1), 0.5, "flag when the fraction of dead ReLU units exceeds this"),
    "saturated_above": Param(Real(0, 1), 0.5, "flag when the fraction of saturated units exceeds this"),
    "gap_above": Param(
        Real(0, None), 0.1, "flag overfitting when the scale-free train-val gap of the rank metric exceeds this"
    ),
    "trend_p": Param(Real(0, 1, low_open=True), 0.05, "still improving: one-sided p of the trend at the end"),
    "improving_share": Param(
        Real(0, None), 0.05, "still improving: least gain over the last quarter, as a share of the curve's range"
    ),
    "early_stop_share": Param(
        Real(0, 1), 0.1, "flag when early stopping kept an epoch within this share of the epoch budget"
    ),
    "unstable_above": Param(
        Real(0, None), 0.3, "flag when the training loss climbs above its low so far by this share of its first value"
    ),
    "miscalibrated_above": Param(
        Real(0, None, low_open=True),
        1.1,
        "flag when val log-loss over the largest a calibrated model can have exceeds this",
    ),
}


# [verdicts]: the level of the board's verdicts and an optional practical-equivalence margin.
# They act on stored numbers: changing them needs no rerun.
VERDICTS = {
    "alpha": Param(Real(0, 0.5, low_open=True, high_open=True), 0.05,
                   "error rate of the verdicts: the possibly-best set misses a truly best configuration "
                   "with probability at most this"),
    "margin": Param(Real(0, None), 0.0,
                    "practical-equivalence margin in the rank metric's units: rows shown within +-margin of the "
                    "best; 0 = off"),
}  # fmt: skip


# [adaptive]: seeds on demand (runner/evidence/race.py). The recipe's seeds list is the most
# any configuration gets; the race's looks use [verdicts] alpha and margin. Not part of any
# job's identity: a raced job computes what the same job of the full grid computes.
ADAPTIVE = {
    "first_seeds": Param(Integer(2, 1000), 3,
                         "seeds every configuration gets before any is dropped (must be fewer than the seeds)"),
    "max_jobs": Param(Integer(0, None), 0,
                      "most jobs the race may train; a round that would pass it is not started; 0 = no limit"),
}  # fmt: skip


@dataclass(frozen=True, slots=True)
class AdaptiveSettings:
    """The [adaptive] table: present means the grid is raced (seeds on demand)."""

    first_seeds: int = 3
    max_jobs: int = 0  # 0: only the seeds list bounds the race


@dataclass(frozen=True, slots=True)
class VerdictSettings:
    """The [verdicts] table."""

    alpha: float = 0.05
    margin: float = 0.0  # 0: no equivalence claims


@dataclass(frozen=True, slots=True)
class RunSettings:
    """The [run] table: where and how wide the grid runs (command-line options win)."""

    on: str = "local"
    workers: int = 0  # 0: chosen by the tool
    keep_weights: str = "possibly_best"  # "all", "possibly_best" or "none"


@dataclass(frozen=True, slots=True)
class TrackingSettings:
    """The [tracking] table."""

    mlflow: str | None = None


@dataclass(frozen=True, slots=True)
class DiagnosticThresholds:
    """The [diagnostics] table: thresholds of the leaderboard's flags."""

    vanishing_below: float = 1e-3
    exploding_above: float = 1e3
    grad_weight_below: float = 1e-6
    grad_weight_above: float = 1e2
    dead_above: float = 0.5
    saturated_above: float = 0.5
    gap_above: float = 0.1
    trend_p: float = 0.05
    improving_share: float = 0.05
    early_stop_share: float = 0.1
    unstable_above: float = 0.3
    miscalibrated_above: float = 1.1


@dataclass(frozen=True, slots=True)
class Recipe:
    path: Path
    text: str
    hash: str
    name: str
    description: str
    seeds: tuple[int, ...]
    rank_by: str | None  # "val.<metric>"; None = the task's default, set by grid.expand
    sections: Mapping[str, Any]  # the [data], [model], [train] tables as written
    factors: tuple[Factor, ...]
    exclude: tuple[Mapping[str, Any], ...]
    baseline: Mapping[str, int]  # factor name -> level index
    diagnostics: DiagnosticThresholds
    baseline_given: bool = False  # the recipe has a [baseline] table of its own
    run: RunSettings = RunSettings()
    tracking: TrackingSettings = TrackingSettings()
    verdicts: VerdictSettings = VerdictSettings()
    adaptive: AdaptiveSettings | None = None  # None: every configuration gets every seed

    @property
    def base_dir(self) -> Path:
        return self.path.parent

    def line_of(self, key: str) -> int | None:
        return line_of(self.text, key)


def load_recipe(path: str | Path) -> Recipe:
    path = Path(path)
    data = read_bounded(path, MAX_RECIPE_BYTES, "recipe file", RecipeError)
    try:
        text = data.decode("utf-8-sig")  # an editor's byte-order mark is not part of the recipe
    except UnicodeDecodeError:
        raise RecipeError("recipe is not UTF-8 text", where=str(path)) from None
    return parse_recipe(text, path)


def parse_recipe(text: str, path: Path) -> Recipe:
    where = path.name
    try:
        raw = tomli.loads(text)
    except RecursionError:  # tomli's own limit on nested arrays and inline tables
        raise RecipeError(
            "arrays or inline tables are nested too deeply", where=where, hint="A recipe needs at most a few levels"
        ) from None
    except tomli.TOMLDecodeError as exc:
        line = getattr(exc, "lineno", None)
        msg = getattr(exc, "msg", str(exc))
        raise RecipeError(
            f"not valid TOML ({msg})", where=where, line=line, hint="Check quotes, brackets and '=' on that line"
        ) from None
    try:
        return recipe_from_tables(raw, text, path)
    except UserError as err:
        raise err.located(where=where, line=line_of(text, err.key) if err.key else None) from None


def recipe_from_tables(raw: dict, text: str, path: Path) -> Recipe:
    for key in raw:
        if key not in TOP_LEVEL:
            near = suggest(key, TOP_LEVEL)
            raise RecipeError(
                "unknown top-level key" + (f'; did you mean "{near}"?' if near else ""),
                key=key,
                allowed=", ".join(TOP_LEVEL),
            )
    if "name" not in raw:
        raise RecipeError("is required", key="name", allowed="a short name for the study")
    name = raw["name"]
    if not isinstance(name, str) or not re.fullmatch(r"[A-Za-z0-9][A-Za-z0-9_.-]{0,63}", name):
        raise RecipeError(
            "must be a short name of letters, digits, '-', '_' or '.'",
            key="name",
            value=name,
            allowed='e.g. "kiln-quickstart"',
        )
    description = raw.get("description", "")
    if not isinstance(description, str):
        raise RecipeError("must be a string", key="description", value=description)
    seeds = _seeds(raw.get("seeds", [1, 2, 3]))
    if "data" not in raw:
        raise RecipeError("is required", key="data", allowed='a [data] table with at least source = "..."')
    sections = {s: raw.get(s, {}) for s in SECTIONS}
    for section, table in SECTIONS.items():
        validate_table(sections[section], table, section)
    rank_by = raw.get("rank_by")
    if rank_by is not None:
        rank_by = check_rank_by(rank_by)
    factors = parse_factors(raw.get("factors", {}), sections)
    exclude = parse_exclude(raw.get("exclude", []), factors)
    baseline = parse_baseline(raw.get("baseline", {}), factors)
    diagnostics = DiagnosticThresholds(**validate_table(raw.get("diagnostics", {}), DIAGNOSTICS, "diagnostics"))
    run = RunSettings(**validate_table(raw.get("run", {}), RUN, "run"))
    tracking = TrackingSettings(**validate_table(raw.get("tracking", {}), TRACKING, "tracking"))
    verdicts = VerdictSettings(**validate_table(raw.get("verdicts", {}), VERDICTS, "verdicts"))
    adaptive = _adaptive(raw, seeds)
    return Recipe(
        path=path.resolve(),
        text=text,
        hash=hashlib.sha256(text.encode()).hexdigest(),
        name=name,
        description=description,
        seeds=seeds,
        rank_by=rank_by,
        sections=MappingProxyType(copy.deepcopy(sections)),
        factors=factors,
        exclude=exclude,
        baseline=MappingProxyType(baseline),
        diagnostics=diagnostics,
        baseline_given="baseline" in raw,
        run=run,
        tracking=tracking,
        verdicts=verdicts,
        adaptive=adaptive,
    )


def _adaptive(raw: dict, seeds: tuple[int, ...]) -> AdaptiveSettings | None:
    if "adaptive" not in raw:
        return None
    adaptive = AdaptiveSettings(**validate_table(raw["adaptive"], ADAPTIVE, "adaptive"))
    if adaptive.first_seeds >= len(seeds):
        raise RecipeError(
            f"must be fewer than the recipe's {len(seeds)} seeds, or the race has no seed to hand out",
            key="adaptive.first_seeds",
            value=adaptive.first_seeds,
            allowed=f"a whole number from 2 to {max(2, len(seeds) - 1)}",
            hint="Add seeds to the seeds list (the most any configuration may get) or lower first_seeds",
        )
    return adaptive


def resolve(sections: Mapping[str, Any], assignments: Mapping[str, Any]) -> Settings:
    """Apply dotted-path assignments to the raw sections and validate: full, typed settings."""
    merged = copy.deepcopy(dict(sections))
    for path, value in assignments.items():
        parts = path.split(".")
        node = merged.setdefault(parts[0], {})
        for part in parts[1:-1]:
            node = node.setdefault(part, {})
        node[parts[-1]] = value
    return Settings.from_dict({s: validate_table(merged.get(s, {}), table, s) for s, table in SECTIONS.items()})


def _seeds(value: Any) -> tuple[int, ...]:
    if not isinstance(value, list) or not value:
        raise RecipeError(
            "must be a non-empty list of whole numbers", key="seeds", value=value, allowed="e.g. [1, 2, 3]"
        )
    for seed in value:
        try:
            if isinstance(seed, float):  # 1.0 is TOML's float: a seed is written as an integer
                raise Invalid("is a float", "")
            Integer(0, 2**31 - 1).check(seed)
        except Invalid:
            raise RecipeError(
                "each seed must be a whole number from 0 to 2147483647",
                key="seeds",
                value=seed,
                allowed="integers written without a decimal point, e.g. [1, 2, 3]",
            ) from None
    if len(set(value)) != len(value):
        raise RecipeError("seeds must not repeat", key="seeds", value=value)
    return tuple(value)


def check_rank_by(value: Any, key: str = "rank_by") -> str:
    """A "val.<metric>" the leaderboard can rank on; ``key`` names where it was given."""
    allowed = ", ".join(f'"val.{m}"' for m in sorted(METRICS))
    if not isinstance(value, str) or "." not in value:
        raise RecipeError('must be "<split>.<metric>"', key=key, value=value, allowed=allowed)
    split, metric = value.split(".", 1)
    if split == "test":
        raise RecipeError(
            "ranking on the test split is refused: choosing on test makes the test score optimistic",
            key=key,
            value=value,
            allowed=allowed,
            hint="Rank on val; the test score is shown beside it",
        )
    if split != "val":
        raise RecipeError("the leaderboard ranks on the validation split", key=key, value=value, allowed=allowed)
    if metric not in METRICS:
        near = suggest(metric, METRICS)
        raise RecipeError(
            "unknown metric",
            key=key,
            value=value,
            allowed=allowed,
            hint=f'Did you mean "val.{near}"?' if near else None,
        )
    return value
