"""scikit-learn's bundled data sets, described without loading them.

A grid needs a data set's fingerprint, task, class count and shape (job keys, checks,
group sizes), not its arrays, and the commands that only read results (`board`,
`status`, `diff`, `report`) never need the arrays at all: importing scikit-learn to load
them costs more than such a command's whole work. So a bundled set is a ``BundledDataset``
that knows those facts from the table below and loads its arrays through scikit-learn on
first use. It travels to worker processes (and Dask workers) as its name and settings and
loads there, once per process; a process whose scikit-learn version is not the one in the
fingerprint refuses to load it, since its arrays could differ.
"""

from __future__ import annotations

import csv
import gzip
import hashlib
import importlib.util
from importlib import metadata
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from runner.components.metrics import Task
from runner.datasets.sources import Dataset
from runner.errors import DataError

if TYPE_CHECKING:
    from runner.recipe.settings import DataSettings

__all__ = ["FACTS", "NAMES", "BundledDataset", "load_bundled"]

# name -> (task, class labels, shape of X as loaded: images as (N, C, H, W); N of the
# generated sets comes from data.n_samples). tests/test_bundled.py holds these equal to
# what scikit-learn loads.
FACTS = {
    "breast_cancer": (Task.CLASSIFICATION, ("malignant", "benign"), (569, 30)),
    "circles": (Task.CLASSIFICATION, ("0", "1"), (None, 2)),
    "diabetes": (Task.REGRESSION, (), (442, 10)),
    "digits": (Task.CLASSIFICATION, tuple(str(d) for d in range(10)), (1797, 1, 8, 8)),
    "iris": (Task.CLASSIFICATION, ("setosa", "versicolor", "virginica"), (150, 4)),
    "moons": (Task.CLASSIFICATION, ("0", "1"), (None, 2)),
    "wine": (Task.CLASSIFICATION, ("class_0", "class_1", "class_2"), (178, 13)),
}


def _sklearn_version() -> str:
    return metadata.version("scikit-learn")  # the installed distribution's, without importing it


def _fingerprint(name: str, n_samples: int, noise: float, version: str) -> str:
    text = f"{name}|sklearn={version}"
    if name in ("moons", "circles"):
        text += f"|n={n_samples}|noise={noise}"
    return hashlib.sha256(text.encode()).hexdigest()


class BundledDataset(Dataset):
    """A bundled data set whose arrays (``X``, ``y``, ``feature_names``) load on first use."""

    def __init__(self, name: str, n_samples: int = 1000, noise: float = 0.1, version: str | None = None):
        task, classes, shape = FACTS[name]
        version = version or _sklearn_version()
        fields = {
            "task": task,
            "classes": classes,
            "fingerprint": _fingerprint(name, n_samples, noise, version),
            "label": name,
            "layout": None,
            "_args": (name, n_samples, noise, version),
            "_shape": (n_samples, *shape[1:]) if shape[0] is None else shape,
            "_arrays": None,
        }
        for key, value in fields.items():
            object.__setattr__(self, key, value)

    def __reduce__(self):  # sent as its name and settings, loaded where it is used
        return (BundledDataset, self._args)

    def __repr__(self) -> str:
        return f"BundledDataset({self.label!r}, fingerprint={self.fingerprint[:12]})"

    @property
    def shape(self) -> tuple[int, ...]:
        return self._shape

    @property
    def image_shape(self) -> tuple[int, ...] | None:
        return self._shape[1:] if len(self._shape) == 4 else None

    def _load(self) -> tuple[np.ndarray, np.ndarray, tuple[str, ...]]:
        if self._arrays is None:
            name, n_samples, noise, version = self._args
            here = _sklearn_version()
            if here != version:
                raise DataError(
                    f"this process has scikit-learn {here}, the grid was planned with {version}",
                    key="data.source",
                    value=name,
                    hint="Install the same scikit-learn version wherever the jobs run",
                )
            object.__setattr__(self, "_arrays", load_bundled(name, n_samples, noise))
        return self._arrays

    @property
    def feature_names(self) -> tuple[str, ...]:
        return tuple(self._load()[2])

    X = property(lambda self: self._load()[0])
    y = property(lambda self: self._load()[1])


def _files() -> Path:
    """scikit-learn's folder of bundled data files, found without importing scikit-learn."""
    spec = importlib.util.find_spec("sklearn")
    return Path(next(iter(spec.submodule_search_locations))) / "datasets" / "data"


def _read_csv(name: str) -> tuple[np.ndarray, np.ndarray]:
    """(X float64, y) of one of scikit-learn's bundled CSV files, parsed as its
    datasets.load_csv_data parses them: a header row (rows, columns, class names), then
    each row's numbers with the class last."""
    with (_files() / name).open(encoding="utf-8") as f:
        rows = list(csv.reader(f))[1:]
    return np.array([r[:-1] for r in rows], dtype=np.float64), np.array([int(r[-1]) for r in rows])


def _read_arrays(name: str) -> tuple[np.ndarray, np.ndarray] | None:
    """X and y of iris, wine, breast_cancer or digits read from scikit-learn's files, bit
    for bit what its loaders return (tests/test_bundled.py), or None for the others."""
    if name in ("iris", "wine", "breast_cancer"):
        return _read_csv({"wine": "wine_data.csv"}.get(name, f"{name}.csv"))
    if name == "digits":  # datasets.load_digits: np.loadtxt of the gzipped CSV, the class last
        with gzip.open(_files() / "digits.csv.gz", "rt") as f:
            data = np.loadtxt(f, delimiter=",")
        return data[:, :-1], data[:, -1].astype(int)
    return None


def load_bundled(name: str, n_samples: int, noise: float) -> tuple[np.ndarray, np.ndarray, tuple[str, ...]]:
    """(X, y, feature names) of a bundled set: read from scikit-learn's files where that is
    simple (importing scikit-learn costs as much as importing torch), else through it."""
    arrays = _read_arrays(name)
    if arrays is not None:
        X, y = arrays
        if name == "digits":  # kept as 8x8 single-channel images; an MLP flattens them
            return X.astype(np.float32).reshape(-1, 1, 8, 8), y.astype(np.int64), tuple(f"pixel{i}" for i in range(64))
        return X.astype(np.float32), y.astype(np.int64), NAMES[name]
    from sklearn import datasets

    if name in ("moons", "circles"):
        make = datasets.make_moons if name == "moons" else datasets.make_circles
        kwargs = {"factor": 0.5} if name == "circles" else {}
        # A fixed generator seed: the dataset is the same for every job; seeds vary the split.
        X, y = make(n_samples=n_samples, noise=noise, random_state=0, **kwargs)
        return X.astype(np.float32), y.astype(np.int64), ("x1", "x2")
    bunch = getattr(datasets, f"load_{name}")()
    X = bunch.data.astype(np.float32)
    if name == "diabetes":
        return X, bunch.target.astype(np.float64), tuple(bunch.feature_names)
    if name == "digits":  # kept as 8x8 single-channel images; an MLP flattens them
        return X.reshape(-1, 1, 8, 8), bunch.target.astype(np.int64), tuple(f"pixel{i}" for i in range(64))
    return X, bunch.target.astype(np.int64), tuple(bunch.feature_names)


# The column names scikit-learn's loaders give these sets (tests/test_bundled.py holds them
# equal), so that naming a column needs no import of scikit-learn.
NAMES = {
    "iris": (
        "sepal length (cm)",
        "sepal width (cm)",
        "petal length (cm)",
        "petal width (cm)",
    ),
    "wine": (
        "alcohol",
        "malic_acid",
        "ash",
        "alcalinity_of_ash",
        "magnesium",
        "total_phenols",
        "flavanoids",
        "nonflavanoid_phenols",
        "proanthocyanins",
        "color_intensity",
        "hue",
        "od280/od315_of_diluted_wines",
        "proline",
    ),
    "breast_cancer": (
        "mean radius",
        "mean texture",
        "mean perimeter",
        "mean area",
        "mean smoothness",
        "mean compactness",
        "mean concavity",
        "mean concave points",
        "mean symmetry",
        "mean fractal dimension",
        "radius error",
        "texture error",
        "perimeter error",
        "area error",
        "smoothness error",
        "compactness error",
        "concavity error",
        "concave points error",
        "symmetry error",
        "fractal dimension error",
        "worst radius",
        "worst texture",
        "worst perimeter",
        "worst area",
        "worst smoothness",
        "worst compactness",
        "worst concavity",
        "worst concave points",
        "worst symmetry",
        "worst fractal dimension",
    ),
}


def bundled(data: DataSettings) -> BundledDataset:
    return BundledDataset(data.source, data.n_samples, data.noise)
