"""Errors a user can act on: where, what is wrong, the value given, what is allowed.

They carry fields and are turned into text only at the command line (see
``UserError.message``). The CLI prints them as one paragraph and exits 2.
"""

from __future__ import annotations

__all__ = ["MISSING", "DataError", "RecipeError", "StoreError", "UserError"]


class _Missing:
    def __repr__(self) -> str:
        return "<missing>"


MISSING = _Missing()


class UserError(Exception):
    """A mistake in the user's input, not a bug in the tool."""

    def __init__(
        self,
        problem: str,
        *,
        where: str | None = None,
        key: str | None = None,
        line: int | None = None,
        value: object = MISSING,
        allowed: str | None = None,
        hint: str | None = None,
    ):
        self.problem = problem
        self.where = where
        self.key = key
        self.line = line
        self.value = value
        self.allowed = allowed
        self.hint = hint
        super().__init__(self.message())

    def message(self) -> str:
        head = []
        if self.where:
            head.append(self.where if self.line is None else f"{self.where}:{self.line}")
        if self.key:
            head.append(self.key)
        text = ": ".join(head + [self.problem])
        if self.value is not MISSING:
            text += f", got {_show(self.value)}"
        if self.allowed:
            text += f"; allowed: {self.allowed}"
        if self.hint:
            text += f". {self.hint}"
        return text

    def located(self, where: str | None = None, line: int | None = None, key: str | None = None) -> UserError:
        """Fill in location fields that were unknown where the error was raised."""
        if where and not self.where:
            self.where = where
        if line and not self.line:
            self.line = line
        if key and not self.key:
            self.key = key
        self.args = (self.message(),)
        return self


class RecipeError(UserError):
    """The recipe file is malformed or asks for something impossible."""


class DataError(UserError):
    """A data file is missing, malformed, or does not fit the recipe."""


class StoreError(UserError):
    """The results store cannot be used as asked."""


SHOWN = 200  # characters of a value an error shows: enough to recognise it, never a screenful


def _show(value: object) -> str:
    if isinstance(value, str):
        text = f'"{value}"'
    elif isinstance(value, bool):
        text = "true" if value else "false"
    else:
        try:
            text = repr(value)
        except RecursionError:
            text = f"a deeply nested {type(value).__name__}"
    return text if len(text) <= SHOWN else f"{text[: SHOWN - 30]}... ({len(text):,} characters)"
