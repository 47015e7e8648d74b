"""A JSON Schema (draft 2020-12) of the recipe format, generated from the same constraint
tables the validator uses, so editors can check and complete recipes as they are typed.

It covers the structure and every key's type and range. Checks that need the data or span
several settings (the target column, the task's metrics, "nesterov needs momentum > 0",
exclusions that remove everything) only the validator can make: `recipe check` does both.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from runner.components.metrics import METRICS
from runner.errors import MISSING
from runner.recipe.constraints import (
    Arguments,
    ArgValue,
    Boolean,
    Choice,
    Either,
    Integer,
    IntList,
    Param,
    Pattern,
    Real,
    Text,
)
from runner.recipe.loader import ADAPTIVE, DIAGNOSTICS, RUN, TRACKING, VERDICTS
from runner.recipe.settings import SECTIONS, all_paths, param_at

__all__ = ["recipe_schema"]

SCHEMA_ID = "https://recipe-runner.invalid/schema/recipe-1.json"

IDENTIFIER = "[A-Za-z_][A-Za-z0-9_]*"  # ASCII only here; the validator also refuses Python keywords
ARGS_PATH = rf"^model\.args\.{IDENTIFIER}$"  # a factor over one constructor argument
ARG_VALUE = {  # a TOML string, number or boolean, or a list of them (lists may nest)
    "anyOf": [{"type": ["string", "number", "boolean"]}, {"type": "array", "items": {"$ref": "#/$defs/arg"}}]
}


def _constraint(c) -> dict:
    if isinstance(c, Real):
        out: dict = {"type": "number"}
        if c.low is not None:
            out["exclusiveMinimum" if c.low_open else "minimum"] = c.low
        if c.high is not None:
            out["exclusiveMaximum" if c.high_open else "maximum"] = c.high
        return out
    if isinstance(c, Integer):
        out = {"type": "integer"}
        if c.low is not None:
            out["minimum"] = c.low
        if c.high is not None:
            out["maximum"] = c.high
        return out
    if isinstance(c, Choice):
        return {"type": "string", "enum": sorted(c.options)}
    if isinstance(c, Boolean):
        return {"type": "boolean"}
    if isinstance(c, Text):
        return {"type": "string", "minLength": 1, "pattern": r"\S"}
    if isinstance(c, IntList):
        return {
            "type": "array",
            "items": {"type": "integer", "minimum": c.low},
            "minItems": c.min_len,
            "maxItems": c.max_len,
        }
    if isinstance(c, Pattern):
        return {"type": "string", "pattern": f"^(?:{c.regex})$"}
    if isinstance(c, Either):
        return {"anyOf": [_constraint(o) for o in c.options]}
    if isinstance(c, ArgValue):
        return {"$ref": "#/$defs/arg"}
    if isinstance(c, Arguments):
        return {
            "type": "object",
            "propertyNames": {"pattern": f"^{IDENTIFIER}$"},
            "additionalProperties": {"$ref": "#/$defs/arg"},
        }
    raise TypeError(f"no schema for {c!r}")


def _param(p: Param) -> dict:
    if p.table is not None:
        return _table(p.table, p.doc)
    out = _constraint(p.constraint)
    if p.doc:
        out["description"] = p.doc
    if isinstance(p.constraint, Arguments):
        out["default"] = {}
    elif p.default is not None and p.default is not MISSING:
        out["default"] = list(p.default) if isinstance(p.default, tuple) else p.default
    return out


def _table(table: Mapping[str, Param], doc: str = "") -> dict:
    out = {
        "type": "object",
        "additionalProperties": False,
        "properties": {k: _param(p) for k, p in table.items()},
        "required": [k for k, p in table.items() if p.table is None and p.default is MISSING],
    }
    if not out["required"]:
        del out["required"]
    if doc:
        out["description"] = doc
    return out


def _levels(path: str) -> dict:
    if path == ARGS_PATH:
        return {"type": "array", "minItems": 1, "items": _constraint(ArgValue())}
    param = param_at(path)
    assert param is not None and param.constraint is not None, path
    return {"type": "array", "minItems": 1, "items": _constraint(param.constraint)}


def recipe_schema() -> dict:
    paths = all_paths()
    linked: dict[str, Any] = {
        "type": "object",
        "minProperties": 1,
        "description": "a linked factor: paths whose level lists move together, position by position",
        "properties": {"labels": {"type": "array", "items": {"type": "string", "minLength": 1}, "uniqueItems": True}},
        "propertyNames": {"anyOf": [{"enum": ["labels", *paths]}, {"pattern": ARGS_PATH}]},
        "patternProperties": {ARGS_PATH: _levels(ARGS_PATH)},
        "additionalProperties": {"type": "array", "minItems": 1},
    }
    for p in paths:
        linked["properties"][p] = _levels(p)
    factors = {
        "type": "object",
        "description": "each key is a setting's dotted path with a list of levels, or a linked "
        "factor's name with a table of paths",
        "properties": {p: _levels(p) for p in paths},
        "patternProperties": {ARGS_PATH: _levels(ARGS_PATH)},
        "additionalProperties": linked,
    }
    scalar = {"type": ["string", "number", "boolean", "array"]}
    return {
        "$schema": "https://json-schema.org/draft/2020-12/schema",
        "$id": SCHEMA_ID,
        "$defs": {"arg": ARG_VALUE},
        "title": "recipe: a seeded training study",
        "type": "object",
        "additionalProperties": False,
        "required": ["name", "data"],
        "properties": {
            "name": {"type": "string", "pattern": r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}$"},
            "description": {"type": "string"},
            "seeds": {
                "type": "array",
                "minItems": 1,
                "uniqueItems": True,
                "items": {"type": "integer", "minimum": 0, "maximum": 2**31 - 1},
            },
            "rank_by": {
                "type": "string",
                "enum": sorted(f"val.{m}" for m in METRICS),
                "description": "ranked on the validation split; never on test",
            },
            **{name: _table(table) for name, table in SECTIONS.items()},
            "factors": factors,
            "exclude": {
                "type": "array",
                "items": {
                    "type": "object",
                    "minProperties": 1,
                    "propertyNames": {"anyOf": [{"enum": paths}, {"pattern": ARGS_PATH}]},
                    "additionalProperties": scalar,
                },
            },
            "baseline": {"type": "object", "additionalProperties": scalar},
            "diagnostics": _table(DIAGNOSTICS),
            "verdicts": _table(VERDICTS),
            "adaptive": _table(ADAPTIVE),
            "run": _table(RUN),
            "tracking": _table(TRACKING),
        },
    }
