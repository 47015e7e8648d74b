"""bundled: scikit-learn's data sets described without loading them, loaded on first use."""

import hashlib
import pickle
import subprocess

import numpy as np
import pytest
from conftest import PYTHON, subprocess_env

from runner.datasets.bundled import FACTS, BundledDataset
from runner.recipe.settings import BUNDLED


@pytest.mark.parametrize("name", BUNDLED)
def test_described_facts_equal_what_sklearn_loads(name):
    """Task, classes and shape known without loading equal the loaded arrays (scikit-learn's
    own loaders and generators are the reference)."""
    from sklearn import datasets

    ds = BundledDataset(name, n_samples=300, noise=0.2)
    described = (ds.task, ds.classes, ds.shape, ds.image_shape)
    assert ds._arrays is None  # nothing loaded yet
    if name in ("moons", "circles"):
        make = datasets.make_moons if name == "moons" else datasets.make_circles
        X, y = make(n_samples=300, noise=0.2, random_state=0, **({"factor": 0.5} if name == "circles" else {}))
        classes = ("0", "1")
    else:
        bunch = getattr(datasets, f"load_{name}")()
        X, y = bunch.data, bunch.target
        classes = tuple(str(c) for c in getattr(bunch, "target_names", ()))
        if name == "digits":
            X = X.reshape(-1, 1, 8, 8)
    assert ds.X.shape == X.shape and np.array_equal(ds.X, X.astype(np.float32)) and np.array_equal(ds.y, y)
    assert described == (ds.task, classes, X.shape, X.shape[1:] if X.ndim == 4 else None)
    assert ds.task == ("regression" if name == "diabetes" else "classification")
    assert len(ds.feature_names) == int(np.prod(X.shape[1:]))


def test_fingerprint_is_the_one_computed_from_the_imported_version():
    """Job keys hash the fingerprint: it must not change with how the version is read."""
    import sklearn

    for name in FACTS:
        text = f"{name}|sklearn={sklearn.__version__}"
        if name in ("moons", "circles"):
            text += "|n=1000|noise=0.1"
        assert BundledDataset(name).fingerprint == hashlib.sha256(text.encode()).hexdigest()


@pytest.mark.parametrize("name", ["iris", "wine", "breast_cancer", "digits"])
def test_read_from_sklearns_files_bit_for_bit_as_its_loaders(name):
    """Read without importing scikit-learn, equal to what its loaders return (the reference)."""
    from sklearn import datasets

    from runner.datasets.bundled import _read_arrays

    X, y = _read_arrays(name)
    bunch = getattr(datasets, f"load_{name}")()
    assert X.dtype == bunch.data.dtype and np.array_equal(X, bunch.data) and np.array_equal(y, bunch.target)
    assert BundledDataset(name).feature_names == tuple(bunch.feature_names) or name == "digits"


def test_travels_as_its_name_and_refuses_another_sklearn():
    ds = BundledDataset("wine")
    assert len(pickle.dumps(ds)) < 300  # not the arrays
    again = pickle.loads(pickle.dumps(ds))
    assert again.fingerprint == ds.fingerprint and np.array_equal(again.X, ds.X)
    other = BundledDataset("wine", version="0.0.1")
    from runner.errors import DataError

    with pytest.raises(DataError, match="scikit-learn"):
        other.X  # noqa: B018


@pytest.mark.slow
def test_describing_and_loading_import_no_sklearn():
    code = (
        "import sys\nfrom runner.datasets.bundled import BundledDataset\n"
        "d = BundledDataset('digits')\nd.shape, d.classes, d.fingerprint, d.X, d.y\n"
        "print('sklearn' in sys.modules, 'scipy' in sys.modules)"
    )
    out = subprocess.run([PYTHON, "-c", code], env=subprocess_env(), capture_output=True, text=True, check=True)
    assert out.stdout.split() == ["False", "False"]
