"""A table's feature columns from a file (CSV or Parquet), checked and laid out as numbers.

Readers hand over ``RawColumn``s; ``build_features`` checks every cell (finite, within
float32, no text or empty cell unless the recipe accepts them) and returns the float32
matrix with, when text or empty cells are accepted, its ``Layout``: each text column
becomes one 0/1 column per value found in the file (sorted), and each column with an empty
cell anywhere in the file gets a 0/1 indicator column right after it. Empty numeric cells
stay NaN and empty text cells all-zero until a training split is known: encoding.py fills
them with statistics of that split, and zeroes the columns of values the split never saw.
Fixing the layout from the file (not from each split) gives every seed the same width, so
jobs of one configuration keep sharing one stacked computation.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np

from runner.errors import DataError

__all__ = [
    "MAX_CATEGORIES",
    "Column",
    "Layout",
    "RawColumn",
    "Table",
    "build_features",
    "check_target_name",
    "short_value",
]

MAX_CATEGORIES = 1000  # distinct values one text column may one-hot encode into
_F32_MAX = float(np.finfo(np.float32).max)


def short_value(text: str) -> str:
    """A cell's text for a message: short cells as they are, long ones only by length, so a
    message never prints a large part of a file."""
    return text if len(text) <= 24 else f"<a {len(text)}-character text>"


def check_target_name(target: str | None, names: list[str], where: str, kind: str = "CSV header") -> None:
    """The recipe's data.target is one of the file's columns, and not the only one."""
    shown = ", ".join(f'"{short_value(h)}"' for h in names[:40]) + (", ..." if len(names) > 40 else "")
    if target is None:
        raise DataError(f"a {kind.split()[0]} source needs the target column named", key="data.target", allowed=shown)
    if target not in names:
        from runner.recipe.constraints import suggest

        near = suggest(target, names)
        raise DataError(
            f"target column not in the {kind}",
            where=where,
            key="data.target",
            value=target,
            allowed=shown,
            hint=f'Did you mean "{near}"?' if near else None,
        )
    if len(names) < 2:
        raise DataError(f"the {kind.split()[0]} has no feature columns besides the target", where=where)


@dataclass(frozen=True)
class RawColumn:
    """One feature column as read. ``numbers`` (float64, NaN where empty) when every non-empty
    cell is a number; else ``texts`` (the stripped cells as str). ``missing`` marks empty cells."""

    name: str
    numbers: np.ndarray | None
    texts: np.ndarray | None
    missing: np.ndarray


@dataclass(frozen=True)
class Table:
    """A file's feature columns and target cells, with each row's place for messages."""

    where: str
    columns: tuple[RawColumn, ...]
    lines: np.ndarray | None  # the CSV line of each row; None: rows are numbered from 1

    def at(self, row: int) -> dict:
        """Location fields of an error about ``row``."""
        if self.lines is not None:
            return {"where": self.where, "line": int(self.lines[row])}
        return {"where": f"{self.where} (row {row + 1})"}


@dataclass(frozen=True)
class Column:
    """Where one input column lands in the feature matrix."""

    name: str
    kind: str  # "numeric" or "categorical"
    start: int  # its first feature column
    categories: tuple[str, ...] = ()  # categorical: the values found in the file, sorted
    indicator: int | None = None  # the feature column marking its empty cells, if it has any

    @property
    def width(self) -> int:
        return len(self.categories) if self.kind == "categorical" else 1


@dataclass(frozen=True)
class Layout:
    """The feature matrix's columns when text or empty cells were accepted."""

    columns: tuple[Column, ...]
    width: int

    def feature_names(self) -> tuple[str, ...]:
        names: list[str] = []
        for col in self.columns:
            names += [f"{col.name}={c}" for c in col.categories] if col.kind == "categorical" else [col.name]
            if col.indicator is not None:
                names.append(f"{col.name} (missing)")
        return tuple(names)


def build_features(table: Table, categorical: str, missing: str) -> tuple[np.ndarray, Layout | None]:
    """The float32 feature matrix and its layout (None when every cell is a number: the
    matrix is then the file's numbers as they are, as before these options existed)."""
    _refuse_first_bad_cell(table, categorical, missing)
    n = len(table.columns[0].missing)
    if all(c.texts is None and not c.missing.any() for c in table.columns):
        X = np.empty((n, len(table.columns)), np.float32)
        for j, col in enumerate(table.columns):
            X[:, j] = col.numbers
        return X, None
    cols: list[Column] = []
    blocks: list[np.ndarray] = []
    start = 0
    for col in table.columns:
        has_missing = bool(col.missing.any())
        if col.texts is None:
            blocks.append(col.numbers.astype(np.float32)[:, None])
            spec = Column(col.name, "numeric", start, indicator=start + 1 if has_missing else None)
        else:
            values, codes = np.unique(col.texts[~col.missing], return_inverse=True)
            onehot = np.zeros((n, len(values)), np.float32)
            onehot[np.flatnonzero(~col.missing), codes] = 1.0
            blocks.append(onehot)
            spec = Column(
                col.name,
                "categorical",
                start,
                tuple(str(v) for v in values),
                start + len(values) if has_missing else None,
            )
        if has_missing:
            blocks.append(col.missing.astype(np.float32)[:, None])
        cols.append(spec)
        start += spec.width + has_missing
    return np.concatenate(blocks, axis=1), Layout(tuple(cols), start)


def _refuse_first_bad_cell(table: Table, categorical: str, missing: str) -> None:
    """Raise for the first bad cell in reading order (row by row, left to right)."""
    first: tuple[int, int, str] | None = None
    for j, col in enumerate(table.columns):
        for row, kind in _bad_cells(col, categorical, missing):
            if first is None or (row, j) < first[:2]:
                first = (row, j, kind)
    if first is None:
        return
    row, j, kind = first
    col = table.columns[j]
    at = table.at(row)
    cell = "" if col.missing[row] else (str(col.texts[row]) if col.texts is not None else str(float(col.numbers[row])))
    if kind == "missing":
        raise DataError(
            f'column "{col.name}" has a missing value (an empty cell)',
            **at,
            allowed='numbers, or empty cells with data.missing = "impute"',
            hint='Set data.missing = "impute" to fill them from the training split, or fill or drop those rows',
        )
    if kind == "text":
        raise DataError(
            f'column "{col.name}" is not numeric',
            **at,
            value=short_value(cell),
            allowed='numbers, or text categories with data.categorical = "onehot"',
            hint=(
                "Decimal commas are not read: write 1.5, not 1,5"
                if re.fullmatch(r"[-+]?\d+,\d+", cell)
                else 'Set data.categorical = "onehot" to one-hot encode text columns, or drop the column'
            ),
        )
    if kind == "mixed":
        raise DataError(
            f'column "{col.name}" mixes numbers and text: most of its cells are numbers',
            **at,
            value=short_value(cell),
            hint="A typo in a numeric column is likelier than a category: fix the cell, "
            "or write every value of a category column as text",
        )
    if kind == "many":
        count = len(np.unique(col.texts[~col.missing]))
        raise DataError(
            f'column "{col.name}" has {count} distinct text values, more than the {MAX_CATEGORIES} '
            "that one column may one-hot encode into",
            where=table.where,
            hint="An identifier or free-text column carries no pattern to learn: drop it",
        )
    raise DataError(
        f'column "{col.name}" has a value outside float32\'s range (largest {_F32_MAX:.4g})'
        if kind == "overflow"
        else f'column "{col.name}" has an infinite or NaN value',
        **at,
        value=short_value(cell),
        allowed="finite numbers",
    )


def _bad_cells(col: RawColumn, categorical: str, missing: str):
    """(row, kind) of this column's first bad cell of each kind."""
    if missing != "impute" and col.missing.any():
        yield int(np.argmax(col.missing)), "missing"
    if col.texts is not None:
        text_rows = ~col.missing & ~_numeric_cells(col.texts)
        first_text = int(np.argmax(text_rows))
        if categorical != "onehot":
            yield first_text, "text"
        elif 2 * text_rows.sum() <= (~col.missing).sum():
            yield first_text, "mixed"
        elif len(np.unique(col.texts[~col.missing])) > MAX_CATEGORIES:
            yield first_text, "many"
        return
    values = col.numbers
    bad = ~np.isfinite(values) & ~col.missing
    if bad.any():
        yield int(np.argmax(bad)), "nonfinite"
    with np.errstate(over="ignore", invalid="ignore"):
        over = np.isfinite(values) & (np.abs(values) > _F32_MAX)
    # float32 rounds values just above its largest to it; only those that become inf overflow
    with np.errstate(over="ignore"):
        over &= ~np.isfinite(values.astype(np.float32))
    if over.any():
        yield int(np.argmax(over)), "overflow"


def _numeric_cells(texts: np.ndarray) -> np.ndarray:
    out = np.zeros(len(texts), bool)
    for i, cell in enumerate(texts):
        try:
            float(cell)
            out[i] = True
        except ValueError:
            pass
    return out
