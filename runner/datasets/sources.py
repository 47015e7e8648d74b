"""Datasets: CSV and NPZ files, scikit-learn's bundled sets, moons and circles.

``load_dataset`` reads a source once (in the main process) into a ``Dataset`` with a
fingerprint of its bytes; splits.py cuts it per seed. Bundled sets are described at once
and loaded on first use (bundled.py).
"""

from __future__ import annotations

import csv
import hashlib
import io
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from runner.components.metrics import Task
from runner.errors import DataError
from runner.recipe.settings import BUNDLED

if TYPE_CHECKING:
    from runner.recipe.settings import DataSettings

__all__ = ["MAX_CLASSES_AUTO", "Dataset", "load_dataset", "source_key"]

MAX_CLASSES_AUTO = 20  # whole-number targets with at most this many values count as classes


@dataclass(frozen=True)
class Dataset:
    X: np.ndarray  # float32, (N, F) or (N, C, H, W) for images
    y: np.ndarray  # int64 class indices, or float64 targets
    task: Task
    classes: tuple[str, ...]  # class labels (classification)
    feature_names: tuple[str, ...]
    fingerprint: str  # sha256 of the bytes (files) or of the generator's settings
    label: str  # where it came from, for messages

    @property
    def image_shape(self) -> tuple[int, ...] | None:
        return tuple(self.X.shape[1:]) if self.X.ndim == 4 else None

    @property
    def shape(self) -> tuple[int, ...]:
        """X's shape (known without loading a bundled set's arrays: bundled.py)."""
        return tuple(self.X.shape)


def source_key(data: DataSettings) -> tuple:
    """The settings that decide which rows are loaded (not how they are split)."""
    return (data.source, data.target, data.task, data.n_samples, data.noise)


def load_dataset(data: DataSettings, base_dir: Path) -> Dataset:
    source = data.source
    if source in BUNDLED:  # described now, loaded on first use (bundled.py)
        from runner.datasets.bundled import bundled

        return bundled(data)
    else:
        path = (base_dir / source).resolve()
        label = str(source)
        try:
            raw = path.read_bytes()
        except FileNotFoundError:
            raise DataError(
                "data file not found",
                key="data.source",
                value=source,
                allowed="a CSV or NPZ path relative to the recipe, or " + ", ".join(BUNDLED),
            ) from None
        except OSError as exc:
            raise DataError(f"cannot read data file ({exc.strerror})", key="data.source", value=source) from None
        fp = hashlib.sha256(raw).hexdigest()
        if path.suffix.lower() == ".npz":
            X, y = _npz(raw, label)
            names = tuple(f"pixel{i}" for i in range(int(np.prod(X.shape[1:]))))
            task, y, classes = _target(y, data.task, label, is_text=False)
        else:
            X, y_raw, names, is_text = _csv(raw, label, data.target)
            task, y, classes = _target(y_raw, data.task, label, is_text)
    if task is Task.CLASSIFICATION and len(classes) < 2:
        raise DataError(
            "the target has only one class",
            key="data.target",
            value=data.target,
            hint="A classifier needs at least two classes",
        )
    return Dataset(X=X, y=y, task=task, classes=classes, feature_names=names, fingerprint=fp, label=label)


def _csv(raw: bytes, label: str, target: str | None):
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError:
        raise DataError("data file is not UTF-8 text", where=label) from None
    numbered = [
        (n, line) for n, line in enumerate(text.splitlines(), 1) if line.strip() and not line.lstrip().startswith("#")
    ]
    if len(numbered) < 2:
        raise DataError("CSV needs a header row and at least one data row", where=label)
    rows = list(csv.reader(io.StringIO("\n".join(line for _, line in numbered))))
    header = [h.strip() for h in rows[0]]
    if target is None:
        raise DataError(
            "a CSV source needs the target column named", key="data.target", allowed=", ".join(f'"{h}"' for h in header)
        )
    if target not in header:
        from runner.recipe.constraints import suggest

        near = suggest(target, header)
        raise DataError(
            "target column not in the CSV header",
            where=label,
            line=numbered[0][0],
            key="data.target",
            value=target,
            allowed=", ".join(f'"{h}"' for h in header),
            hint=f'Did you mean "{near}"?' if near else None,
        )
    t = header.index(target)
    names = tuple(h for i, h in enumerate(header) if i != t)
    if not names:
        raise DataError("the CSV has no feature columns besides the target", where=label)
    X = np.empty((len(rows) - 1, len(names)), dtype=np.float32)
    y_raw = []
    for r, row in enumerate(rows[1:]):
        line = numbered[r + 1][0]
        if len(row) != len(header):
            raise DataError(f"row has {len(row)} fields, the header has {len(header)}", where=label, line=line)
        y_raw.append(row[t].strip())
        c = 0
        for i, cell in enumerate(row):
            if i == t:
                continue
            if not cell.strip():
                raise DataError(
                    f'column "{header[i]}" has a missing value',
                    where=label,
                    line=line,
                    allowed="numbers (missing values are not accepted)",
                    hint="Fill or drop rows with missing values",
                )
            try:
                X[r, c] = float(cell)
            except ValueError:
                raise DataError(
                    f'column "{header[i]}" is not numeric',
                    where=label,
                    line=line,
                    value=cell.strip(),
                    allowed="numbers (missing values are not accepted)",
                    hint="Encode categories as numbers or drop the column",
                ) from None
            if not np.isfinite(X[r, c]):
                raise DataError(
                    f'column "{header[i]}" has an infinite or NaN value', where=label, line=line, value=cell.strip()
                )
            c += 1
    if any(v == "" for v in y_raw):
        line = numbered[1 + y_raw.index("")][0]
        raise DataError(f'target column "{target}" has an empty value', where=label, line=line)
    try:
        y = np.array([float(v) for v in y_raw])
        is_text = False
    except ValueError:
        y = np.array(y_raw, dtype=object)
        is_text = True
    return X, y, names, is_text


def _npz(raw: bytes, label: str):
    try:
        with np.load(io.BytesIO(raw), allow_pickle=False) as z:
            if "X" not in z or "y" not in z:
                raise DataError("an NPZ source needs arrays named X and y", where=label, value=sorted(z.keys()))
            X, y = z["X"], z["y"]
    except DataError:
        raise
    except Exception as exc:  # numpy raises several kinds for a bad archive
        raise DataError(f"not a readable NPZ archive ({exc})", where=label) from None
    if X.ndim == 3:
        X = X[:, None]
    if X.ndim != 4 or len(X) != len(y) or y.ndim != 1:
        raise DataError(
            "NPZ needs X of shape (N, H, W) or (N, C, H, W) and y of shape (N,)",
            where=label,
            value=f"X{tuple(X.shape)}, y{tuple(y.shape)}",
        )
    return X.astype(np.float32), y


def _target(y: np.ndarray, task: str, label: str, is_text: bool):
    if task == "auto":
        whole = not is_text and np.all(np.mod(y.astype(float), 1) == 0)
        task = "classification" if is_text or (whole and len(np.unique(y)) <= MAX_CLASSES_AUTO) else "regression"
    if task == Task.REGRESSION:
        if is_text:
            raise DataError(
                "a text target cannot be a regression target",
                where=label,
                key="data.task",
                value="regression",
                allowed='"classification"',
            )
        return Task.REGRESSION, y.astype(np.float64), ()
    values = sorted(set(y.tolist()), key=lambda v: (isinstance(v, str), v))
    index = {v: i for i, v in enumerate(values)}
    classes = tuple(str(int(v)) if isinstance(v, float) and v.is_integer() else str(v) for v in values)
    return Task.CLASSIFICATION, np.array([index[v] for v in y.tolist()], dtype=np.int64), classes
