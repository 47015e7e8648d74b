"""The target: text labels or numbers, checked, and made into class indices or values.

Class order is the sorted order of the labels (numbers numerically, text alphabetically),
so the same file always gives the same class indices.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from runner.components.metrics import Task
from runner.datasets.columns import short_value
from runner.errors import DataError

__all__ = ["MAX_CLASSES_AUTO", "target_from_array", "target_from_cells"]

MAX_CLASSES_AUTO = 20  # whole-number targets with at most this many values count as classes
_NAN_WORDS = {"nan", "-nan", "+nan"}


def target_from_cells(
    cells: list[str], name: str, task: str, at: Callable[[int], dict], where: str
) -> tuple[Task, np.ndarray, tuple[str, ...]]:
    """A file column's target cells (stripped text); ``at(row)`` locates a row for messages."""
    for r, cell in enumerate(cells):
        if cell == "":
            raise DataError(
                f'target column "{name}" has an empty cell',
                **at(r),
                hint="Every row needs a target: fill or drop that row",
            )
        if cell.lower() in _NAN_WORDS:
            raise DataError(f'target column "{name}" has a NaN value', **at(r), value=cell, hint="Fix or drop that row")
    try:
        values = np.array([float(v) for v in cells])
    except ValueError:
        return _make_target(np.array(cells, dtype=object), task, where, is_text=True)
    bad = ~np.isfinite(values)
    if bad.any():
        r = int(np.argmax(bad))
        raise DataError(
            f'target column "{name}" has an infinite value',
            **at(r),
            value=short_value(cells[r]),
            allowed="finite numbers or text labels",
            hint="Fix or drop that row",
        )
    return _make_target(values, task, where, is_text=False)


def target_from_array(y: np.ndarray, where: str, task: str, name: str = "y") -> tuple[Task, np.ndarray, tuple]:
    """A target array (NPZ ``y``, Parquet column): numbers, booleans or text labels."""
    kind = y.dtype.kind
    if kind in "US":
        labels = np.char.decode(y, "utf-8", errors="replace") if kind == "S" else y
        labels = np.array([str(v).strip() for v in labels], dtype=object)
        empty = labels == ""
        if empty.any():
            raise DataError(f'"{name}" has an empty label', where=f"{where} (row {int(np.argmax(empty)) + 1})")
        return _make_target(labels, task, where, is_text=True)
    if kind == "b":
        y = y.astype(np.int64)
    elif kind == "c":
        raise DataError(f'"{name}" holds complex numbers', where=where, allowed="real numbers or text labels")
    elif kind not in "iuf":
        raise DataError(f'"{name}" has an unsupported type', where=where, value=str(y.dtype))
    values = y.astype(np.float64)
    bad = ~np.isfinite(values)
    if bad.any():
        r = int(np.argmax(bad))
        raise DataError(
            f'"{name}" has {int(bad.sum())} NaN or infinite values, the first in row {r + 1}',
            where=where,
            allowed="finite numbers",
        )
    return _make_target(values, task, where, is_text=False)


def _make_target(y: np.ndarray, task: str, where: str, is_text: bool) -> tuple[Task, np.ndarray, tuple[str, ...]]:
    if task == "auto":
        whole = not is_text and bool(np.all(np.mod(y.astype(float), 1) == 0))
        task = "classification" if is_text or (whole and len(np.unique(y)) <= MAX_CLASSES_AUTO) else "regression"
    if task == Task.REGRESSION:
        if is_text:
            raise DataError(
                "a text target cannot be a regression target",
                where=where,
                key="data.task",
                value="regression",
                allowed='"classification"',
            )
        return Task.REGRESSION, y.astype(np.float64), ()
    values = sorted(set(y.tolist()), key=lambda v: (isinstance(v, str), v))
    index = {v: i for i, v in enumerate(values)}
    classes = tuple(str(int(v)) if isinstance(v, float) and v.is_integer() else str(v) for v in values)
    return Task.CLASSIFICATION, np.array([index[v] for v in y.tolist()], dtype=np.int64), classes
