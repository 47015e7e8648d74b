"""Encodings fitted on one training split, and their record (``Preprocessing``).

For a table read with text or empty cells accepted (columns.py laid it out), a training
split fixes: the mean of each numeric column with empty cells (the value that fills
them), the most frequent value of each text column with empty cells (ties: the first in
sorted order, as scikit-learn's SimpleImputer picks), and which values of each text column
it saw: the one-hot columns of values it never saw are zero in every row, so an unseen
value at val or test encodes as all zeros (scikit-learn's handle_unknown="ignore"). Then
scaling is fitted on the encoded training rows.

``Preprocessing`` records all of it, in a JSON form an exported model can carry, and
``Preprocessing.transform`` applies it to new rows given as cells by column name.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from runner.datasets.columns import Layout
from runner.errors import DataError

__all__ = ["ColumnEncoding", "Preprocessing", "describe_preprocessing", "encode_split"]

FORMAT = "recipe-preprocessing"
VERSION = 1


@dataclass(frozen=True)
class ColumnEncoding:
    """One input column's fitted encoding."""

    name: str
    kind: str  # "numeric" or "categorical"
    slots: tuple[str, ...] = ()  # categorical: the value of each one-hot column, in order
    seen: tuple[str, ...] = ()  # categorical: the values the training split had (others encode as zeros)
    fill: float | str | None = None  # the value empty cells get (None: the column had no empty cell)

    @property
    def indicator(self) -> bool:
        return self.fill is not None


@dataclass(frozen=True)
class Preprocessing:
    """How one split's features were made from the data, every statistic from its training rows."""

    columns: tuple[ColumnEncoding, ...]  # input columns in order (images, NPZ: one per feature)
    feature_names: tuple[str, ...]  # the model's input columns, after encoding
    scale: str  # "standard", "minmax" or "none"
    offset: tuple[float, ...]  # subtracted from each feature (standard: mean; minmax: minimum)
    divisor: tuple[float, ...]  # then divided by (standard: std, or 1 when constant; minmax: range)
    image_shape: tuple[int, ...] | None = None  # (C, H, W) for image data

    def to_json(self) -> dict[str, Any]:
        return {
            "format": FORMAT,
            "version": VERSION,
            "columns": [
                {"name": c.name, "kind": c.kind, "slots": list(c.slots), "seen": list(c.seen), "fill": c.fill}
                for c in self.columns
            ],
            "feature_names": list(self.feature_names),
            "scale": self.scale,
            "offset": list(self.offset),
            "divisor": list(self.divisor),
            "image_shape": list(self.image_shape) if self.image_shape else None,
        }

    @classmethod
    def from_json(cls, doc: Mapping[str, Any]) -> Preprocessing:
        if doc.get("format") != FORMAT or doc.get("version") != VERSION:
            raise ValueError(f"not a {FORMAT} document of version {VERSION}")
        cols = tuple(
            ColumnEncoding(c["name"], c["kind"], tuple(c["slots"]), tuple(c["seen"]), c["fill"]) for c in doc["columns"]
        )
        shape = doc.get("image_shape")
        return cls(
            cols,
            tuple(doc["feature_names"]),
            doc["scale"],
            tuple(float(v) for v in doc["offset"]),
            tuple(float(v) for v in doc["divisor"]),
            tuple(shape) if shape else None,
        )

    def transform(self, cells: Mapping[str, Sequence[Any]]) -> np.ndarray:
        """Features for new rows, given each input column's cells (numbers or text; "" or
        None is an empty cell), encoded and scaled as this split's rows were."""
        return self.apply(self.encode(cells))

    def encode(self, cells: Mapping[str, Sequence[Any]]) -> np.ndarray:
        """Features for new rows, encoded (fills, one-hot, indicators) but not yet scaled."""
        blocks = [_encode_column(c, cells) for c in self.columns]
        return np.concatenate(blocks, axis=1).astype(np.float32)

    def apply(self, X: np.ndarray) -> np.ndarray:
        """Scale already-encoded features (N, F), or images (N, C, H, W), as this split's were."""
        flat = np.asarray(X, np.float32).reshape(len(X), -1)
        out = ((flat - np.array(self.offset, np.float32)) / np.array(self.divisor, np.float32)).astype(np.float32)
        return out.reshape((len(X), *self.image_shape)) if self.image_shape else out


def _encode_column(c: ColumnEncoding, cells: Mapping[str, Sequence[Any]]) -> np.ndarray:
    if c.name not in cells:
        raise DataError(f'column "{c.name}" is missing', allowed=", ".join(f'"{n}"' for n in cells))
    values = list(cells[c.name])
    empty = np.array([v is None or (isinstance(v, str) and not v.strip()) for v in values])
    if empty.any() and c.fill is None:
        raise DataError(f'column "{c.name}" has an empty cell, and the training data had none to learn a fill from')
    if c.kind == "numeric":
        x = np.array([c.fill if e else float(v) for v, e in zip(values, empty)], np.float64)[:, None]
    else:
        index = {v: i for i, v in enumerate(c.slots) if v in set(c.seen)}
        x = np.zeros((len(values), len(c.slots)))
        for r, (v, e) in enumerate(zip(values, empty)):
            i = index.get(c.fill if e else str(v).strip())
            if i is not None:
                x[r, i] = 1.0
    if c.indicator:
        x = np.concatenate([x, empty[:, None].astype(np.float64)], axis=1)
    return x


def encode_split(X: np.ndarray, layout: Layout | None, train_idx: np.ndarray, where: str):
    """(features with the training split's fills applied and unseen values zeroed, the
    per-column encodings). Without a layout, X as it is and plain numeric columns."""
    if layout is None:
        return X, None
    X = X.copy()
    out = []
    for col in layout.columns:
        s = col.start
        fill = None
        if col.kind == "numeric":
            if col.indicator is not None:
                fill = _column_mean(X[train_idx, s], col.name, where)
                X[np.isnan(X[:, s]), s] = fill
            out.append(ColumnEncoding(col.name, "numeric", fill=fill))
            continue
        counts = X[train_idx, s : s + col.width].sum(axis=0)
        seen = counts > 0
        if col.indicator is not None:
            if not seen.any():
                raise _empty_in_training(col.name, where)
            best = int(np.argmax(counts))  # the first of equal counts: the smallest value
            X[X[:, col.indicator] == 1.0, s + best] = 1.0
            fill = col.categories[best]
        X[:, s : s + col.width][:, ~seen] = 0.0
        out.append(
            ColumnEncoding(
                col.name, "categorical", col.categories, tuple(str(v) for v in np.array(col.categories)[seen]), fill
            )
        )
    return X, tuple(out)


def _column_mean(values: np.ndarray, name: str, where: str) -> float:
    present = values[~np.isnan(values)]
    if not len(present):
        raise _empty_in_training(name, where)
    return float(np.float32(present.astype(np.float64).mean()))


def _empty_in_training(name: str, where: str) -> DataError:
    return DataError(
        f'column "{name}" has no value in the training split, so nothing to fill its empty cells from',
        where=where,
        key="data.missing",
        hint="Drop the column, or give it more values",
    )


def describe_preprocessing(
    feature_names: Sequence[str],
    encodings: tuple[ColumnEncoding, ...] | None,
    layout: Layout | None,
    scale: str,
    offset: np.ndarray,
    divisor: np.ndarray,
    image_shape: tuple[int, ...] | None,
) -> Preprocessing:
    """The record of one split's preprocessing (encodings from ``encode_split``)."""
    if encodings is None:
        encodings = tuple(ColumnEncoding(str(n), "numeric") for n in feature_names)
    names = layout.feature_names() if layout is not None else tuple(str(n) for n in feature_names)
    return Preprocessing(
        encodings,
        names,
        scale,
        tuple(float(v) for v in np.broadcast_to(offset, (len(names),))),
        tuple(float(v) for v in np.broadcast_to(divisor, (len(names),))),
        image_shape,
    )
