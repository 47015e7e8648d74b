"""Constraint tables: each setting declares its type, range and default in one place.

One generic validator (``validate_table``) turns a table plus raw TOML values
into checked values or a ``RecipeError`` naming the key and what is allowed.
The same tables drive the documentation of defaults and the JSON Schema.
"""

from __future__ import annotations

import difflib
import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from runner.errors import MISSING, RecipeError

__all__ = [
    "ArgValue",
    "Arguments",
    "Boolean",
    "Choice",
    "Constraint",
    "Either",
    "Examples",
    "IntList",
    "Integer",
    "Invalid",
    "Param",
    "Pattern",
    "Real",
    "Text",
    "suggest",
    "validate_table",
]


class Invalid(ValueError):
    """A value broke a constraint; ``problem`` says how, ``allowed`` says what would do."""

    def __init__(
        self, problem: str, allowed: str, hint: str | None = None, key: str | None = None, value: Any = MISSING
    ):
        super().__init__(problem)
        self.problem = problem
        self.allowed = allowed
        self.hint = hint
        self.key = key  # an entry inside the checked value (e.g. one constructor argument)
        self.value = value  # that entry's value


class Constraint:
    def check(self, value: Any) -> Any:  # returns the normalized value
        raise NotImplementedError

    def allowed(self) -> str:
        raise NotImplementedError


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


@dataclass(frozen=True, slots=True)
class Real(Constraint):
    low: float | None = None
    high: float | None = None
    low_open: bool = False
    high_open: bool = False

    def check(self, value: Any) -> float:
        if not _is_number(value):
            raise Invalid("must be a number", self.allowed())
        value = float(value)
        if not math.isfinite(value):
            raise Invalid("must be finite", self.allowed())
        if self.low is not None and (value < self.low or (self.low_open and value == self.low)):
            raise Invalid(f"must be {'>' if self.low_open else '>='} {self.low:g}", self.allowed())
        if self.high is not None and (value > self.high or (self.high_open and value == self.high)):
            raise Invalid(f"must be {'<' if self.high_open else '<='} {self.high:g}", self.allowed())
        return value

    def allowed(self) -> str:
        if self.low is not None and self.high is not None:
            left = "(" if self.low_open else "["
            right = ")" if self.high_open else "]"
            return f"a number in {left}{self.low:g}, {self.high:g}{right}"
        if self.low is not None:
            return f"a number {'>' if self.low_open else '>='} {self.low:g}"
        if self.high is not None:
            return f"a number {'<' if self.high_open else '<='} {self.high:g}"
        return "a number"


@dataclass(frozen=True, slots=True)
class Integer(Constraint):
    low: int | None = None
    high: int | None = None

    def check(self, value: Any) -> int:
        if isinstance(value, float) and value.is_integer():
            value = int(value)  # 30.0 is 30, as JSON Schema's "integer" also says
        if isinstance(value, bool) or not isinstance(value, int):
            raise Invalid("must be a whole number", self.allowed())
        if self.low is not None and value < self.low:
            raise Invalid(f"must be >= {self.low}", self.allowed())
        if self.high is not None and value > self.high:
            raise Invalid(f"must be <= {self.high}", self.allowed())
        return value

    def allowed(self) -> str:
        if self.low is not None and self.high is not None:
            return f"a whole number from {self.low} to {self.high}"
        if self.low is not None:
            return f"a whole number >= {self.low}"
        return "a whole number"


@dataclass(frozen=True, slots=True)
class Choice(Constraint):
    options: tuple[str, ...]

    def check(self, value: Any) -> str:
        if not isinstance(value, str) or value not in self.options:
            near = suggest(value, self.options) if isinstance(value, str) else None
            raise Invalid("unknown choice", self.allowed(), f'Did you mean "{near}"?' if near else None)
        return value

    def allowed(self) -> str:
        return ", ".join(f'"{o}"' for o in sorted(self.options))


@dataclass(frozen=True, slots=True)
class Pattern(Constraint):
    """A string matching a regular expression (anchored at both ends)."""

    regex: str
    shown: str

    def check(self, value: Any) -> str:
        import re

        if not isinstance(value, str) or not re.fullmatch(self.regex, value):
            raise Invalid(f"must look like {self.shown}", self.allowed())
        return value

    def allowed(self) -> str:
        return self.shown


@dataclass(frozen=True, slots=True)
class Boolean(Constraint):
    def check(self, value: Any) -> bool:
        if not isinstance(value, bool):
            raise Invalid("must be true or false", self.allowed())
        return value

    def allowed(self) -> str:
        return "true or false"


@dataclass(frozen=True, slots=True)
class Text(Constraint):
    def check(self, value: Any) -> str:
        if not isinstance(value, str) or not value.strip():
            raise Invalid("must be a non-empty string", self.allowed())
        return value

    def allowed(self) -> str:
        return "a non-empty string"


@dataclass(frozen=True, slots=True)
class IntList(Constraint):
    low: int = 1
    min_len: int = 0
    max_len: int = 64

    def check(self, value: Any) -> tuple[int, ...]:
        if not isinstance(value, (list, tuple)):
            raise Invalid("must be a list of whole numbers", self.allowed())
        if not self.min_len <= len(value) <= self.max_len:
            raise Invalid(f"must have {self.min_len} to {self.max_len} entries", self.allowed())
        for item in value:
            if isinstance(item, bool) or not isinstance(item, int) or item < self.low:
                raise Invalid(f"entries must be whole numbers >= {self.low}", self.allowed())
        return tuple(value)

    def allowed(self) -> str:
        return f"a list of {self.min_len} to {self.max_len} whole numbers, each >= {self.low}"


@dataclass(frozen=True, slots=True)
class Either(Constraint):
    """The first constraint that accepts the value wins."""

    options: tuple[Constraint, ...]

    def check(self, value: Any) -> Any:
        problems = []
        for option in self.options:
            try:
                return option.check(value)
            except Invalid as bad:
                problems.append(bad)
        # Report the option of the value's own kind: a string against the choices, else the first.
        pick = problems[-1] if isinstance(value, str) else problems[0]
        raise Invalid(pick.problem, self.allowed(), pick.hint)

    def allowed(self) -> str:
        return " or ".join(o.allowed() for o in self.options)


@dataclass(frozen=True, slots=True)
class ArgValue(Constraint):
    """One constructor argument of a user's network: a TOML string, finite number or
    boolean, or a list of them (lists may nest). Lists become tuples, so settings holding
    them stay hashable; the network's constructor gets them back as lists."""

    def check(self, value: Any) -> Any:
        if isinstance(value, (list, tuple)):
            return tuple(self.check(v) for v in value)
        if isinstance(value, float) and not math.isfinite(value):
            raise Invalid("must be finite", self.allowed())
        if not isinstance(value, (str, int, float, bool)):
            raise Invalid("must be a string, number, boolean or a list of them", self.allowed())
        return value

    def allowed(self) -> str:
        return "a string, a finite number, true/false, or a list of these"


@dataclass(frozen=True, slots=True)
class Arguments(Constraint):
    """A free-form table of keyword arguments (``[model.args]``): names that are Python
    identifiers, each an ``ArgValue``. Normalized to a tuple of (name, value) pairs sorted by
    name: frozen, hashable, and the same whatever order the recipe writes them in."""

    def check(self, value: Any) -> tuple[tuple[str, Any], ...]:
        import keyword

        if isinstance(value, tuple):  # already normalized (a resolved configuration)
            value = dict(value)
        if not isinstance(value, Mapping):
            raise Invalid("must be a table of name = value", self.allowed())
        out = []
        for name in sorted(value):
            if not (isinstance(name, str) and name.isidentifier() and not keyword.iskeyword(name)):
                raise Invalid(
                    "is not a Python argument name",
                    "names of letters, digits and _ that are not Python keywords",
                    key=str(name),
                    value=value[name],
                )
            try:
                out.append((name, ArgValue().check(value[name])))
            except Invalid as bad:
                raise Invalid(bad.problem, bad.allowed, key=name, value=value[name]) from None
        return tuple(out)

    def allowed(self) -> str:
        return "a table of argument = value, each " + ArgValue().allowed()

    def entry(self, name: str) -> Param | None:
        """The setting of one argument, as a factor path ``model.args.<name>`` names it."""
        import keyword

        if not name.isidentifier() or keyword.iskeyword(name):
            return None
        return Param(ArgValue(), doc=f"constructor argument {name}")


@dataclass(frozen=True, slots=True)
class Param:
    """One setting: its constraint, default (MISSING = required) and a one-line doc."""

    constraint: Constraint | None
    default: Any = MISSING
    doc: str = ""
    table: Mapping[str, Param] | None = field(default=None)  # nested table of settings


@dataclass(frozen=True, slots=True)
class Examples:
    """A component's worked examples, walked by the registry test: ``valid`` recipe tables
    (e.g. {"train": {"optimizer": "sgd", "lr": 0.1}}) that must validate and train, and
    ``invalid`` ones, each with a fragment of the message it must be refused with."""

    valid: tuple[Mapping[str, Any], ...] = ()
    invalid: tuple[tuple[Mapping[str, Any], str], ...] = ()


def suggest(word: str, options) -> str | None:
    close = difflib.get_close_matches(word, sorted(options), n=1, cutoff=0.6)
    return close[0] if close else None


def validate_table(raw: Any, table: Mapping[str, Param], prefix: str) -> dict[str, Any]:
    """Check ``raw`` against ``table``; return a full dict with defaults filled in.

    Raises RecipeError with ``key`` set to the dotted path of the first bad entry.
    """
    if not isinstance(raw, Mapping):
        raise RecipeError(
            "must be a table", key=prefix, value=raw, allowed="a TOML table of " + ", ".join(sorted(table))
        )
    for key in raw:
        if key not in table:
            near = suggest(key, table)
            raise RecipeError(
                "unknown key" + (f'; did you mean "{prefix}.{near}"?' if near else ""),
                key=f"{prefix}.{key}",
                allowed=", ".join(sorted(table)),
            )
    out: dict[str, Any] = {}
    for key, param in table.items():
        path = f"{prefix}.{key}"
        if param.table is not None:
            out[key] = validate_table(raw.get(key, {}), param.table, path)
            continue
        constraint = param.constraint
        assert constraint is not None, path  # every leaf has one (tests/test_components.py)
        if key not in raw:
            if param.default is MISSING:
                raise RecipeError("is required", key=path, allowed=constraint.allowed())
            out[key] = param.default
            continue
        value = raw[key]
        try:
            out[key] = constraint.check(value)
        except Invalid as bad:
            where, shown = (f"{path}.{bad.key}", bad.value) if bad.key else (path, value)
            raise RecipeError(bad.problem, key=where, value=shown, allowed=bad.allowed, hint=bad.hint) from None
    return out
