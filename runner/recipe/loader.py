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
from runner.recipe.settings import SECTIONS, Settings, all_paths, param_at

__all__ = [
    "DiagnosticThresholds",
    "Factor",
    "Recipe",
    "RunSettings",
    "TrackingSettings",
    "load_recipe",
    "parse_recipe",
    "resolve",
]

TOP_LEVEL = (
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
)

# [run]: where and how wide the grid runs; command-line options override it. Not part of any
# job's identity: the same job gives the same numbers wherever it runs.
RUN = {
    "on": Param(
        Either((Choice(("dask-local", "local")), Pattern(r"dask://[^\s/]+:\d+", "dask://HOST:PORT"))),
        "local",
        'where jobs run: "local", "dask-local" or "dask://HOST:PORT"',
    ),
    "workers": Param(Integer(1, 4096), 0, "worker processes (0 = the number of cores)"),
}
TRACKING = {
    "mlflow": Param(Text(), None, "MLflow tracking URI to log every finished job to, e.g. sqlite:///mlflow.db"),
}

# Thresholds for the leaderboard's flags. They act on stored numbers, so changing them
# needs no rerun and they are not part of a job's identity.
DIAGNOSTICS = {
    "vanishing_below": Param(
        Real(0, None, low_open=True), 1e-3, "flag when first-layer / last-layer gradient norm at init is below this"
    ),
    "exploding_above": Param(
        Real(0, None, low_open=True), 1e3, "flag when first-layer / last-layer gradient norm at init is above this"
    ),
    "dead_above": Param(Real(0, 1), 0.5, "flag when the fraction of dead ReLU units exceeds this"),
    "saturated_above": Param(Real(0, 1), 0.5, "flag when the fraction of saturated units exceeds this"),
    "gap_above": Param(Real(0, None), 0.1, "flag overfitting when train minus val metric exceeds this"),
}


@dataclass(frozen=True, slots=True)
class RunSettings:
    """The [run] table: where and how wide the grid runs (command-line options win)."""

    on: str = "local"
    workers: int = 0  # 0: chosen by the tool


@dataclass(frozen=True, slots=True)
class TrackingSettings:
    """The [tracking] table."""

    mlflow: str | None = None


@dataclass(frozen=True, slots=True)
class DiagnosticThresholds:
    """The [diagnostics] table: thresholds of the leaderboard's flags."""

    vanishing_below: float = 1e-3
    exploding_above: float = 1e3
    dead_above: float = 0.5
    saturated_above: float = 0.5
    gap_above: float = 0.1


@dataclass(frozen=True, slots=True)
class Factor:
    """A factor: one path, or several linked paths whose levels move together."""

    name: str
    paths: tuple[str, ...]
    levels: tuple[tuple[Any, ...], ...]  # levels[i][j] = value of paths[j] at level i
    names: tuple[str, ...] | None = None  # optional level names of a linked factor

    def label(self, i: int) -> str:
        if self.names:
            return self.names[i]
        return "/".join(_fmt(v) for v in self.levels[i])


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

    @property
    def base_dir(self) -> Path:
        return self.path.parent

    def line_of(self, key: str) -> int | None:
        return _line_of(self.text, key)


def load_recipe(path: str | Path) -> Recipe:
    path = Path(path)
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise RecipeError("recipe file not found", where=str(path), hint="Give the path of a .toml recipe") from None
    except OSError as exc:
        raise RecipeError(f"cannot read recipe ({exc.strerror})", where=str(path)) from None
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError:
        raise RecipeError("recipe is not UTF-8 text", where=str(path)) from None
    return parse_recipe(text, path)


def parse_recipe(text: str, path: Path) -> Recipe:
    where = path.name
    try:
        raw = tomli.loads(text)
    except tomli.TOMLDecodeError as exc:
        line = getattr(exc, "lineno", None)
        msg = getattr(exc, "msg", str(exc))
        raise RecipeError(
            f"not valid TOML ({msg})", where=where, line=line, hint="Check quotes, brackets and '=' on that line"
        ) from None
    try:
        return recipe_from_tables(raw, text, path)
    except UserError as err:
        raise err.located(where=where, line=_line_of(text, err.key) if err.key else None) from None


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
        rank_by = _rank_by(rank_by)
    factors = _factors(raw.get("factors", {}), sections)
    exclude = _exclude(raw.get("exclude", []), factors)
    baseline = _baseline(raw.get("baseline", {}), factors)
    diagnostics = DiagnosticThresholds(**validate_table(raw.get("diagnostics", {}), DIAGNOSTICS, "diagnostics"))
    run = RunSettings(**validate_table(raw.get("run", {}), RUN, "run"))
    tracking = TrackingSettings(**validate_table(raw.get("tracking", {}), TRACKING, "tracking"))
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
    )


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
            Integer(0, 2**31 - 1).check(seed)
        except Invalid:
            raise RecipeError(
                "each seed must be a whole number from 0 to 2147483647", key="seeds", value=seed
            ) from None
    if len(set(value)) != len(value):
        raise RecipeError("seeds must not repeat", key="seeds", value=value)
    return tuple(value)


def _rank_by(value: Any) -> str:
    allowed = ", ".join(f'"val.{m}"' for m in sorted(METRICS))
    if not isinstance(value, str) or "." not in value:
        raise RecipeError('must be "<split>.<metric>"', key="rank_by", value=value, allowed=allowed)
    split, metric = value.split(".", 1)
    if split == "test":
        raise RecipeError(
            "ranking on the test split is refused: choosing on test makes the test score optimistic",
            key="rank_by",
            value=value,
            allowed=allowed,
            hint="Rank on val; the test score is shown beside it",
        )
    if split != "val":
        raise RecipeError("the leaderboard ranks on the validation split", key="rank_by", value=value, allowed=allowed)
    if metric not in METRICS:
        near = suggest(metric, METRICS)
        raise RecipeError(
            "unknown metric",
            key="rank_by",
            value=value,
            allowed=allowed,
            hint=f'Did you mean "val.{near}"?' if near else None,
        )
    return value


def _check_path(path: str, key: str) -> Param:
    param = param_at(path)
    if param is None:
        near = suggest(path, all_paths())
        raise RecipeError(
            "is not a setting that can vary" + (f'; did you mean "{near}"?' if near else ""),
            key=key,
            allowed='a dotted path such as "train.lr" or "model.hidden"',
        )
    return param


def _check_level(param: Param, value: Any, key: str) -> Any:
    if param.constraint is None:
        return value
    try:
        return param.constraint.check(value)
    except Invalid as bad:
        raise RecipeError(bad.problem, key=key, value=value, allowed=bad.allowed, hint=bad.hint) from None


def _factors(raw: Any, sections: dict) -> tuple[Factor, ...]:
    if not isinstance(raw, dict):
        raise RecipeError("must be a table", key="factors", value=raw)
    factors, seen = [], {}
    for name, spec in raw.items():
        key = f'factors."{name}"'
        names = None
        if isinstance(spec, dict):  # linked: several paths, equal-length level lists
            spec = dict(spec)
            names = spec.pop("labels", None)
            if not spec:
                raise RecipeError("a linked factor needs at least one path", key=key)
            paths = tuple(spec)
            lengths = {len(v) if isinstance(v, list) else -1 for v in spec.values()}
            if -1 in lengths:
                raise RecipeError("each linked path needs a list of levels", key=key)
            if len(lengths) != 1:
                raise RecipeError(
                    "linked level lists must have equal lengths", key=key, value={p: len(v) for p, v in spec.items()}
                )
            columns = [spec[p] for p in paths]
        elif isinstance(spec, list):
            paths, columns = (name,), [spec]
        else:
            raise RecipeError(
                "must be a list of levels, or a table of linked paths",
                key=key,
                value=spec,
                allowed='e.g. "train.lr" = [0.1, 0.01]',
            )
        for path in paths:
            pkey = key if len(paths) == 1 else f'{key}."{path}"'
            param = _check_path(path, pkey)
            if path in seen:
                raise RecipeError(f'is already varied by factor "{seen[path]}"', key=pkey)
            seen[path] = name
            column = columns[paths.index(path)]
            if not column:
                raise RecipeError("has no levels", key=pkey, allowed="a list of at least one level")
            for i, value in enumerate(column):
                column[i] = _check_level(param, value, f"{pkey}[{i}]")
        levels = tuple(zip(*columns))
        if len(set(map(_freeze, levels))) != len(levels):
            raise RecipeError("levels must not repeat", key=key, value=[list(l) for l in levels])
        if names is not None:
            ok = (
                isinstance(names, list)
                and len(names) == len(levels)
                and all(isinstance(n, str) and n.strip() for n in names)
                and len(set(names)) == len(names)
            )
            if not ok:
                raise RecipeError(
                    "labels must be distinct non-empty strings, one per level",
                    key=f"{key}.labels",
                    value=names,
                    allowed=f"a list of {len(levels)} distinct names",
                )
            names = tuple(names)
        factors.append(Factor(name=name, paths=paths, levels=levels, names=names))
    return tuple(factors)


def _exclude(raw: Any, factors: tuple[Factor, ...]) -> tuple[Mapping[str, Any], ...]:
    if not isinstance(raw, list) or not all(isinstance(r, dict) for r in raw):
        raise RecipeError(
            "must be a list of tables",
            key="exclude",
            value=raw,
            allowed='e.g. [[exclude]] with "train.optimizer" = "sgd"',
        )
    by_path = {p: (f, j) for f in factors for j, p in enumerate(f.paths)}
    out = []
    for i, rule in enumerate(raw):
        if not rule:
            raise RecipeError("an empty rule would exclude everything", key=f"exclude[{i}]")
        for path, value in rule.items():
            if path not in by_path:
                raise RecipeError(
                    "names no factor path",
                    key=f'exclude[{i}]."{path}"',
                    allowed=", ".join(f'"{p}"' for p in sorted(by_path)) or "(no factors)",
                )
            factor, j = by_path[path]
            values = [lvl[j] for lvl in factor.levels]
            if _freeze(value) not in map(_freeze, values):
                raise RecipeError(
                    "is not one of the factor's levels, so the rule never applies",
                    key=f'exclude[{i}]."{path}"',
                    value=value,
                    allowed=", ".join(_fmt(v) for v in values),
                )
        out.append(MappingProxyType(dict(rule)))
    return tuple(out)


def _baseline(raw: Any, factors: tuple[Factor, ...]) -> dict[str, int]:
    if not isinstance(raw, dict):
        raise RecipeError("must be a table of factor = level", key="baseline", value=raw)
    by_name = {f.name: f for f in factors}
    chosen = {}
    for name, value in raw.items():
        if name not in by_name:
            raise RecipeError(
                "names no factor",
                key=f'baseline."{name}"',
                allowed=", ".join(f'"{n}"' for n in sorted(by_name)) or "(no factors)",
            )
        factor = by_name[name]
        wanted = tuple(value) if len(factor.paths) > 1 and isinstance(value, list) else (value,)
        matches = [i for i, lvl in enumerate(factor.levels) if _freeze(lvl) == _freeze(wanted)]
        if not matches and factor.names and value in factor.names:
            matches = [factor.names.index(value)]
        if not matches:
            raise RecipeError(
                "is not one of the factor's levels",
                key=f'baseline."{name}"',
                value=value,
                allowed=", ".join(factor.label(i) for i in range(len(factor.levels))),
            )
        chosen[name] = matches[0]
    return {f.name: chosen.get(f.name, 0) for f in factors}


def _freeze(value: Any) -> Any:
    if isinstance(value, (list, tuple)):
        return tuple(_freeze(v) for v in value)
    if isinstance(value, bool):
        return ("bool", value)
    if isinstance(value, (int, float)):
        return float(value)
    return value


def _fmt(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return f"{value:g}"
    if isinstance(value, (list, tuple)):
        return "[" + ",".join(_fmt(v) for v in value) + "]"
    return str(value)


def _line_of(text: str, key: str | None) -> int | None:
    """Best-effort TOML line for a dotted key, a quoted factor key, or a top-level key."""
    if not key:
        return None
    lines = text.splitlines()
    quoted = re.findall(r'"([^"]+)"', key)
    if key.startswith(("factors.", "exclude", "baseline.")) and quoted:
        for n, line in enumerate(lines, 1):
            if f'"{quoted[-1]}"' in line and "=" in line:
                return n
        return None
    parts = key.split(".")
    if len(parts) == 1:
        for n, line in enumerate(lines, 1):
            if re.match(rf'\s*"?{re.escape(parts[0])}"?\s*=', line) or re.match(
                rf"\s*\[\[?\s*{re.escape(parts[0])}\s*\]", line
            ):
                return n
        return None
    for cut in range(len(parts) - 1, 0, -1):  # "model.args.width": [model.args] width =, else [model] args =
        section, name, inside = ".".join(parts[:cut]), parts[cut], False
        for n, line in enumerate(lines, 1):
            header = re.match(r"\s*\[+\s*([^\]]+?)\s*\]+", line)
            if header:
                inside = header.group(1) == section
                continue
            if inside and re.match(rf'\s*"?{re.escape(name)}"?\s*=', line):
                return n
    for n, line in enumerate(lines, 1):
        if re.match(rf"\s*\[\s*{re.escape(parts[0])}\s*\]", line):
            return n
    return None
