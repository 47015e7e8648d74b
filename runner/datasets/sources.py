"""Datasets: CSV, Parquet and NPZ files, image folders, scikit-learn's bundled sets, moons
and circles.

``load_dataset`` reads a source once (in the main process) into a ``Dataset`` with a
fingerprint of its bytes; splits.py cuts it per seed. The readers live beside this module
(csv_reader, parquet_reader, npz_reader, images) and share the checks of columns.py and
targets.py. Bundled sets are described at once and loaded on first use (bundled.py).
"""

from __future__ import annotations

import copy
import csv
import dataclasses
import hashlib
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from runner.components.metrics import Task
from runner.datasets.columns import Layout, build_features, check_target_name
from runner.datasets.csv_reader import CsvFile, split_csv
from runner.datasets.files import MAX_DATA_BYTES, read_limited
from runner.datasets.npz_reader import read_npz
from runner.datasets.targets import MAX_CLASSES_AUTO, target_from_array, target_from_cells
from runner.errors import DataError
from runner.recipe.settings import BUNDLED

if TYPE_CHECKING:
    from runner.recipe.settings import DataSettings

__all__ = [
    "MAX_CLASSES_AUTO",
    "Dataset",
    "column_cells",
    "is_image_source",
    "load_dataset",
    "same_bytes_other_reading",
    "source_key",
]

PARQUET_SUFFIXES = (".parquet", ".pq")


@dataclass(frozen=True)
class Dataset:
    X: np.ndarray  # float32, (N, F) or (N, C, H, W) for images
    y: np.ndarray  # int64 class indices, or float64 targets
    task: Task
    classes: tuple[str, ...]  # class labels (classification)
    feature_names: tuple[str, ...]
    fingerprint: str  # sha256 of the bytes (files) or of the generator's settings
    label: str  # where it came from, for messages
    layout: Layout | None = None  # text or empty cells accepted: X's columns (encoded per split)

    @property
    def image_shape(self) -> tuple[int, ...] | None:
        return tuple(self.X.shape[1:]) if self.X.ndim == 4 else None

    def replaced(self, **changes) -> Dataset:
        """A plain Dataset of these arrays (a bundled set's, loaded) with ``changes`` made."""
        fields = {f.name: getattr(self, f.name) for f in dataclasses.fields(Dataset)}
        return Dataset(**{**fields, **changes})

    @property
    def shape(self) -> tuple[int, ...]:
        """X's shape (known without loading a bundled set's arrays: bundled.py)."""
        return tuple(self.X.shape)


def source_key(data: DataSettings) -> tuple:
    """The settings that decide which rows are loaded and how (not how they are split)."""
    return (
        data.source,
        data.target,
        data.task,
        data.n_samples,
        data.noise,
        data.categorical,
        data.missing,
        data.image_size,
        data.color,
    )


def load_dataset(data: DataSettings, base_dir: Path) -> Dataset:
    """Read ``data.source`` (a bundled name, or a path relative to ``base_dir``; absolute
    paths as they are) once, checked: every refusal is a DataError naming the cell or array."""
    source = data.source
    layout = None
    if source in BUNDLED and (base_dir / source).exists():
        raise DataError(
            "names both a bundled data set and a file or folder beside the recipe",
            key="data.source",
            value=source,
            hint=f'Write "./{source}" for the file or folder',
        )
    folder = source not in BUNDLED and (base_dir / source).is_dir()
    if not folder:
        _refuse_image_options(data)
    if source in BUNDLED:  # described now, loaded on first use (bundled.py)
        from runner.datasets.bundled import bundled

        return bundled(data)
    else:
        path = base_dir / source
        label = str(source)
        if not path.exists():
            raise DataError(
                "data file not found",
                key="data.source",
                value=source,
                allowed="a CSV, Parquet or NPZ file or an image folder, relative to the recipe, or "
                + ", ".join(BUNDLED),
            )
        if folder:
            from runner.datasets.images import read_image_folder

            if data.task == "regression":
                raise DataError(
                    "an image folder's labels are classes (its subfolders)",
                    key="data.task",
                    value="regression",
                    allowed='"auto" or "classification"',
                )
            X, y, classes, fp = read_image_folder(path, label, data.image_size, data.color)
            task, names = Task.CLASSIFICATION, tuple(f"pixel{i}" for i in range(int(np.prod(X.shape[1:]))))
        else:
            X, y, names, task, classes, layout, fp = _read_file(path, label, data)
    if task is Task.CLASSIFICATION and len(classes) < 2:
        raise DataError(
            "the target has only one class",
            key="data.target",
            value=data.target,
            hint="A classifier needs at least two classes",
        )
    return Dataset(
        X=X, y=y, task=task, classes=classes, feature_names=names, fingerprint=fp, label=label, layout=layout
    )


def _read_file(path: Path, label: str, data: DataSettings):
    raw = read_limited(path, MAX_DATA_BYTES, key="data.source", shown=label)
    fp = hashlib.sha256(raw).hexdigest()
    suffix = path.suffix.lower()
    if suffix == ".npz":
        X, y_arr = read_npz(raw, label)
        names = tuple(f"pixel{i}" if X.ndim > 2 else f"x{i}" for i in range(int(np.prod(X.shape[1:]))))
        task, y, classes = target_from_array(y_arr, label, data.task)
        return X, y, names, task, classes, None, fp
    if suffix in PARQUET_SUFFIXES:
        from runner.datasets.parquet_reader import read_parquet

        table, target = read_parquet(raw, label, data.target)
        task, y, classes = target_from_array(target, label, data.task, name=data.target)
    else:
        csv_file = CsvFile(raw, label)
        check_target_name(data.target, csv_file.header, label)
        table, cells = split_csv(csv_file, data.target)
        task, y, classes = target_from_cells(cells, data.target, data.task, table.at, label)
    X, layout = build_features(table, data.categorical, data.missing)
    names = layout.feature_names() if layout is not None else tuple(c.name for c in table.columns)
    if (data.categorical, data.missing) != ("error", "error"):
        # Options that can change what is read make another dataset of the same bytes.
        fp = hashlib.sha256(f"{fp}|{data.categorical}|{data.missing}".encode()).hexdigest()
    return X, y, names, task, classes, layout, fp


def same_bytes_other_reading(ds: Dataset, key: tuple) -> Dataset:
    """``ds`` with a fingerprint of its bytes and of how they were read (``source_key``),
    for a grid that reads one file in two ways."""
    fp = hashlib.sha256(f"{ds.fingerprint}|{key!r}".encode()).hexdigest()
    out = copy.copy(ds)  # a bundled set stays lazy (dataclasses.replace would rebuild it)
    object.__setattr__(out, "fingerprint", fp)
    return out


def column_cells(path: Path, shown: str) -> dict[str, list[str]]:
    """Each column's cells as text, by name, of a CSV or Parquet file (for `recipe new`'s
    guess of the target), read and checked as load_dataset reads it."""
    raw = read_limited(path, MAX_DATA_BYTES, key=None, shown=shown)
    if path.suffix.lower() in PARQUET_SUFFIXES:
        from runner.datasets.parquet_reader import parquet_cells

        return parquet_cells(raw, shown)
    f = CsvFile(raw, shown)
    rows = list(csv.reader(f.rows_text, delimiter=f.delimiter))
    return {h: [r[i].strip() for r in rows if i < len(r)] for i, h in enumerate(f.header)}


def is_image_source(path: Path) -> bool:
    """Whether a data file or folder holds images (a folder, or an NPZ whose X has 3 or 4
    axes), for `recipe new`'s choice of model."""
    if path.is_dir():
        return True
    if path.suffix.lower() != ".npz":
        return False
    X, _ = read_npz(read_limited(path, MAX_DATA_BYTES, key=None, shown=str(path)), str(path))
    return X.ndim == 4


def _refuse_image_options(data: DataSettings) -> None:
    for key, value, default in (("image_size", data.image_size, None), ("color", data.color, "auto")):
        if value != default:
            raise DataError(
                "applies to image folders only",
                key=f"data.{key}",
                value=list(value) if isinstance(value, tuple) else value,
                hint="Remove it, or point data.source at a folder with one subfolder of images per class",
            )
