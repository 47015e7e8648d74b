"""The [factors], [[exclude]] and [baseline] tables: what varies, what is skipped, and each
factor's reference level."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from types import MappingProxyType
from typing import Any

from runner.errors import RecipeError
from runner.recipe.constraints import Invalid, Param, suggest
from runner.recipe.settings import all_paths, param_at

__all__ = ["Factor", "format_level", "freeze", "parse_baseline", "parse_exclude", "parse_factors"]


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
        return "/".join(format_level(v) for v in self.levels[i])


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


def parse_factors(raw: Any, sections: dict) -> tuple[Factor, ...]:
    if not isinstance(raw, dict):
        raise RecipeError("must be a table", key="factors", value=raw)
    factors: list[Factor] = []
    seen: dict[str, str] = {}
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
        if len(set(map(freeze, levels))) != len(levels):
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


def parse_exclude(raw: Any, factors: tuple[Factor, ...]) -> tuple[Mapping[str, Any], ...]:
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
        normal = {}  # each value as the factor holds its level (a list level is a tuple there)
        for path, value in rule.items():
            if path not in by_path:
                raise RecipeError(
                    "names no factor path",
                    key=f'exclude[{i}]."{path}"',
                    allowed=", ".join(f'"{p}"' for p in sorted(by_path)) or "(no factors)",
                )
            factor, j = by_path[path]
            values = [lvl[j] for lvl in factor.levels]
            frozen = [freeze(v) for v in values]
            if freeze(value) not in frozen:
                raise RecipeError(
                    "is not one of the factor's levels, so the rule never applies",
                    key=f'exclude[{i}]."{path}"',
                    value=value,
                    allowed=", ".join(format_level(v) for v in values),
                )
            normal[path] = values[frozen.index(freeze(value))]
        out.append(MappingProxyType(normal))
    return tuple(out)


def parse_baseline(raw: Any, factors: tuple[Factor, ...]) -> dict[str, int]:
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
        matches = [i for i, lvl in enumerate(factor.levels) if freeze(lvl) == freeze(wanted)]
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


def freeze(value: Any) -> Any:
    if isinstance(value, (list, tuple)):
        return tuple(freeze(v) for v in value)
    if isinstance(value, bool):
        return ("bool", value)
    if isinstance(value, (int, float)):
        return float(value)
    return value


def format_level(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return f"{value:g}"
    if isinstance(value, (list, tuple)):
        return "[" + ",".join(format_level(v) for v in value) + "]"
    return str(value)
