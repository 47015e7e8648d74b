"""Parquet files, through pyarrow (the optional extra ``.[parquet]``), checked like a CSV.

Numeric and boolean columns are numbers; string (and dictionary-of-string) columns are
text cells; a null, or an empty string, is an empty cell. Every cell then meets the same
checks as a CSV's (columns.build_features, targets), with rows numbered from 1 in messages.
"""

from __future__ import annotations

import numpy as np

from runner.datasets.columns import RawColumn, Table, check_target_name
from runner.datasets.files import MAX_DATA_BYTES, show_bytes
from runner.errors import DataError

__all__ = ["parquet_cells", "read_parquet"]


def _pyarrow():
    try:
        import pyarrow as pa
        import pyarrow.parquet as pq
    except ImportError:
        raise DataError(
            "reading a Parquet file needs pyarrow, which is not installed",
            key="data.source",
            hint='Install it with: python -m pip install -c constraints.txt -e ".[parquet]"',
        ) from None
    return pa, pq


def parquet_cells(raw: bytes, where: str) -> dict[str, list[str]]:
    """Each column's cells as text ("" for null), by name."""
    pa, _ = _pyarrow()
    table = _read(raw, where)
    out = {}
    for name, column in zip(table.column_names, table.columns):
        values, missing = _column(pa, column, str(name), where)
        out[str(name)] = [
            "" if m else (repr(float(v)) if values.dtype.kind == "f" else str(v)) for v, m in zip(values, missing)
        ]
    return out


def _read(raw: bytes, where: str):
    pa, pq = _pyarrow()
    try:
        pf = pq.ParquetFile(pa.BufferReader(raw))
        meta = pf.metadata
        unpacked = sum(meta.row_group(i).total_byte_size for i in range(meta.num_row_groups))
        if unpacked > MAX_DATA_BYTES:
            raise DataError(
                f"the Parquet file unpacks to {show_bytes(unpacked)}, more than the "
                f"{show_bytes(MAX_DATA_BYTES)} this tool reads",
                where=where,
            )
        return pf.read()
    except DataError:
        raise
    except Exception:  # pyarrow raises several kinds for a damaged file
        raise DataError("not a readable Parquet file", where=where) from None


def read_parquet(raw: bytes, where: str, target: str | None) -> tuple[Table, np.ndarray]:
    """The feature columns and the target column (numbers as float64, or text) of a Parquet file."""
    pa, _ = _pyarrow()
    table = _read(raw, where)
    names = [str(n) for n in table.column_names]
    dups = sorted({n for n in names if names.count(n) > 1})
    if dups:
        raise DataError("the file repeats column names: " + ", ".join(f'"{n}"' for n in dups), where=where)
    check_target_name(target, names, where, kind="Parquet file's columns")
    if table.num_rows == 0:
        raise DataError("the Parquet file has no rows", where=where)
    cols = []
    y = None
    for name, column in zip(names, table.columns):
        values, missing = _column(pa, column, name, where)
        if name == target:
            if missing.any():
                row = int(np.argmax(missing)) + 1
                raise DataError(
                    f'target column "{name}" has an empty cell',
                    where=f"{where} (row {row})",
                    hint="Fix or drop that row",
                )
            y = values
        elif values.dtype.kind == "f":
            cols.append(RawColumn(name, values, None, missing))
        else:
            cols.append(RawColumn(name, None, values, missing))
    return Table(where, tuple(cols), None), y


def _column(pa, column, name: str, where: str) -> tuple[np.ndarray, np.ndarray]:
    """(float64 values with NaN where null, or str cells; the null/empty mask)."""
    kind = column.type
    if pa.types.is_dictionary(kind):
        column = column.cast(kind.value_type)
        kind = column.type
    missing = np.asarray(column.is_null().to_numpy(zero_copy_only=False), dtype=bool)
    if pa.types.is_integer(kind) or pa.types.is_floating(kind) or pa.types.is_boolean(kind):
        values = column.cast(pa.float64()).to_numpy(zero_copy_only=False)
        values = np.where(missing, np.nan, values)
        return values, missing
    if pa.types.is_string(kind) or pa.types.is_large_string(kind):
        cells = np.array(["" if v is None else str(v).strip() for v in column.to_pylist()], dtype=str)
        return cells, missing | (cells == "")
    raise DataError(
        f'column "{name}" has type {kind}, which is not read',
        where=where,
        allowed="numbers, booleans or text",
        hint="Convert or drop the column",
    )
