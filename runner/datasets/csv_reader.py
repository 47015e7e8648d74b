"""CSV files: a header row, then rows of cells; blank lines and lines starting with '#' skipped.

The separator is found from the header and the first lines (',' ';' tab '|': the one that
splits them all into the same number of fields, at least two; ',' when several do). Cells
are parsed vectorized by numpy's C reader (``np.loadtxt``); only when it refuses the file
(a text or empty cell, a short row, a number it does not read) are the rows parsed by the
csv module, cell by cell, to name the bad cell or to read text and empty cells the recipe
accepts. Both give the same float32 numbers: each cell is read as a double (Python's
``float``) and rounded to float32 once.
"""

from __future__ import annotations

import csv
import io
import re

import numpy as np

from runner.datasets.columns import RawColumn, Table, short_value
from runner.errors import DataError

__all__ = ["DELIMITERS", "CsvFile", "find_delimiter", "split_csv"]

DELIMITERS = (",", ";", "\t", "|")
_NAMES = {",": "','", ";": "';'", "\t": "tab", "|": "'|'"}
_SNIFF_LINES = 20
_SKIPPED = re.compile(r"\s*(#|$)")  # blank lines and comment lines (matched at a line's start)


class CsvFile:
    """A CSV's text split into its header and data lines (blank and '#' lines dropped)."""

    def __init__(self, raw: bytes, where: str):
        try:
            text = raw.decode("utf-8-sig")
        except UnicodeDecodeError:
            raise DataError("data file is not UTF-8 text", where=where) from None
        lines = text.splitlines()
        kept = [i for i, line in enumerate(lines) if not _SKIPPED.match(line)]
        if len(kept) < 2:
            raise DataError("CSV needs a header row and at least one data row", where=where)
        self.where = where
        self.header_line = kept[0] + 1
        self.lines = np.array(kept[1:]) + 1  # line numbers, from 1
        self.rows_text = [lines[i] for i in kept[1:]]
        self.delimiter = find_delimiter(lines[kept[0]], self.rows_text[:_SNIFF_LINES])
        self.header = _header(lines[kept[0]], self.delimiter, where, self.header_line)


def find_delimiter(header: str, sample: list[str]) -> str:
    """The separator that splits the header and sample lines into one equal number (>= 2)
    of fields (the first of ',' ';' tab '|' when several do); when none does, the one that
    splits the header into the most fields, so a ragged row is reported by its line."""
    fits = []
    for d in DELIMITERS:
        widths = {len(r) for r in csv.reader([header, *sample], delimiter=d)}
        if len(widths) == 1 and widths.pop() >= 2:
            fits.append(d)
    if fits:
        return fits[0]
    return max(DELIMITERS, key=lambda d: (len(next(csv.reader([header], delimiter=d))), -DELIMITERS.index(d)))


def _header(line: str, delimiter: str, where: str, line_no: int) -> list[str]:
    names = [h.strip() for h in next(csv.reader([line], delimiter=delimiter))]
    if len(names) == 1:
        # Not a table at all (e.g. some other text file): say so without printing it.
        raise DataError(
            "the first line has no ',', ';', tab or '|' separator: this is not a CSV table",
            where=where,
            line=line_no,
            allowed="a header row of column names, then one row of cells per example",
        )
    for i, name in enumerate(names):
        if not name:
            raise DataError(f"column {i + 1} of the header has no name", where=where, line=line_no)
    seen: dict[str, list[int]] = {}
    for i, name in enumerate(names):
        seen.setdefault(name, []).append(i + 1)
    dups = {n: p for n, p in seen.items() if len(p) > 1}
    if dups:
        listed = "; ".join(f'"{short_value(n)}" (columns {", ".join(map(str, p))})' for n, p in dups.items())
        raise DataError(
            f"the header repeats column names: {listed}",
            where=where,
            line=line_no,
            hint="Give every column its own name: a repeated target would be read as a feature",
        )
    return names


def split_csv(f: CsvFile, target: str) -> tuple[Table, list[str]]:
    """The feature columns and the target's cells (stripped) of a CSV whose header has
    ``target`` (checked by the caller: columns.check_target_name)."""
    t = f.header.index(target)
    fast = _parse_fast(f, t)
    if fast is not None:
        X, y_cells = fast
        cols = tuple(
            RawColumn(name, X[:, j], None, np.zeros(len(X), bool))
            for j, name in enumerate(n for i, n in enumerate(f.header) if i != t)
        )
        return Table(f.where, cols, f.lines), y_cells
    return _parse_cells(f, t)


def _parse_fast(f: CsvFile, t: int) -> tuple[np.ndarray, list[str]] | None:
    """numpy's C reader: every cell but the target's read as a double; None if it refuses."""
    y_cells: list[str] = []

    def keep(cell: str) -> float:
        y_cells.append(cell.strip())
        return 0.0

    try:
        X = np.loadtxt(
            io.StringIO("\n".join(f.rows_text)),
            delimiter=f.delimiter,
            quotechar='"',
            comments=None,
            dtype=np.float64,
            converters={t: keep},
            ndmin=2,
        )
    except ValueError:
        return None
    if X.shape[1] != len(f.header):
        return None
    return np.delete(X, t, axis=1), y_cells


def _parse_cells(f: CsvFile, t: int) -> tuple[Table, list[str]]:
    """The csv module's rows, checked row by row: the path that names a bad row or cell,
    and reads text and empty cells."""
    rows = list(csv.reader(f.rows_text, delimiter=f.delimiter))
    width = len(f.header)
    for r, row in enumerate(rows):
        if len(row) != width:
            raise DataError(
                f"row has {len(row)} fields, the header has {width} (separated by {_NAMES[f.delimiter]})",
                where=f.where,
                line=int(f.lines[r]),
            )
    cells = np.array(rows, dtype=object).reshape(len(rows), width)
    cols = []
    for j, name in enumerate(f.header):
        if j == t:
            continue
        stripped = np.array([c.strip() for c in cells[:, j]], dtype=object)
        missing = stripped == ""
        numbers = _as_numbers(stripped, missing)
        if numbers is None:
            cols.append(RawColumn(name, None, stripped.astype(str), missing))
        else:
            cols.append(RawColumn(name, numbers, None, missing))
    y_cells = [c.strip() for c in cells[:, t]]
    return Table(f.where, tuple(cols), f.lines), y_cells


def _as_numbers(cells: np.ndarray, missing: np.ndarray) -> np.ndarray | None:
    """float64 values (NaN where empty), or None when some non-empty cell is not a number."""
    out = np.full(len(cells), np.nan)
    for i in np.flatnonzero(~missing):
        try:
            out[i] = float(cells[i])
        except ValueError:
            return None
    return out
