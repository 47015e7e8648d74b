"""npz_reader: NPZ arrays are checked like CSV cells before any job runs; text labels in y
are classes. The bad archives in tests/data/npz_*.npz were written once by numpy.savez
from seeded random arrays (12 rows, 4 features) with one defect each."""

import numpy as np
import pytest
from conftest import DATA, invoke, write_recipe
from sklearn.datasets import load_digits

from runner.datasets.sources import load_dataset
from runner.recipe.loader import resolve


def recipe_for(tmp_path, source, model="hidden = [4]"):
    return write_recipe(
        tmp_path,
        f"""
        name = "npz-check"
        seeds = [1]
        [data]
        source = "{source}"
        split = {{ val = 0.25, test = 0.25, stratify = false }}
        [model]
        {model}
        [train]
        epochs = 1
        """,
    )


@pytest.mark.parametrize(
    ("name", "phrases"),
    [
        ("npz_nan_x.npz", ["X has 1 NaN or infinite values, the first at index (3, 1)"]),
        ("npz_inf_y.npz", ['"y" has 1 NaN or infinite values, the first in row 6']),
        ("npz_overflow.npz", ["X has values outside float32's range", "index (2, 2)"]),
        ("npz_complex.npz", ["X holds complex numbers", "complex128"]),
        ("npz_text_x.npz", ["X must hold numbers", "<U1"]),
        ("npz_lengths.npz", ["X has 12 rows but y has 10"]),
    ],
)
def test_bad_arrays_are_refused_before_any_job(tmp_path, name, phrases):
    """`recipe check` and `recipe run` exit 2 with one line naming the file and the defect,
    and leave no store."""
    recipe = recipe_for(tmp_path, DATA / name)
    for args in (("check", recipe, "--no-probe"), ("run", recipe, "--workers", "1")):
        result = invoke(*args)
        assert result.exit_code == 2, result.output
        message = result.stderr.strip()
        assert message.startswith(f"error: {DATA / name}") and "\n" not in message, message
        for phrase in phrases:
            assert phrase in message, (phrase, message)
    assert not (tmp_path / "runs").exists()


def test_text_labels_are_classes_through_new_check_and_run(tmp_path):
    """y of text labels ("cat", "dog"): `recipe new` writes a starter that `recipe check`
    accepts and `recipe run` trains, with the labels as classes in sorted order."""
    out = tmp_path / "pets.toml"
    result = invoke("new", DATA / "npz_text_y.npz", "--out", out)
    assert result.exit_code == 0, result.output
    text = out.read_text().replace("epochs = 30", "epochs = 1").replace("seeds = [1, 2, 3, 4, 5]", "seeds = [1]")
    out.write_text(text)
    assert invoke("check", out, "--no-probe").exit_code == 0
    result = invoke("run", out, "--workers", "1", "-q", "--format", "json")
    assert result.exit_code == 0, result.output
    ds = load_dataset(resolve({"data": {"source": str(DATA / "npz_text_y.npz")}}, {}).data, tmp_path)
    assert ds.classes == ("cat", "dog") and ds.task == "classification"
    assert np.array_equal(ds.y, np.arange(40) % 2)


def test_digits_as_npz_equal_the_bundled_digits(tmp_path):
    """scikit-learn's digits saved as NPZ (int images, int labels) load as the bundled
    source does: the same float32 pixels, labels and class names."""
    digits = load_digits()
    np.savez(tmp_path / "d.npz", X=digits.images.astype(np.int64), y=digits.target)
    from_npz = load_dataset(resolve({"data": {"source": "d.npz"}}, {}).data, tmp_path)
    bundled = load_dataset(resolve({"data": {"source": "digits"}}, {}).data, tmp_path)
    assert np.array_equal(from_npz.X, bundled.X) and from_npz.X.dtype == np.float32
    assert np.array_equal(from_npz.y, bundled.y) and from_npz.classes == bundled.classes


def test_two_dimensional_x_is_tabular(tmp_path):
    """X of shape (N, F) trains an MLP; a CNN on it is refused as before."""
    rng = np.random.default_rng(1)
    np.savez(tmp_path / "t.npz", X=rng.normal(size=(60, 3)), y=np.arange(60) % 3)
    recipe = recipe_for(tmp_path, "t.npz")
    assert invoke("run", recipe, "--workers", "1", "-q").exit_code == 0
    cnn = recipe_for(tmp_path, "t.npz", model='kind = "cnn"')
    result = invoke("check", cnn, "--no-probe")
    assert result.exit_code == 2 and "needs image data" in result.stderr


def test_pickled_arrays_are_not_loaded(tmp_path):
    """An object array needs a pickle, which can run code: it is refused, not unpickled."""
    np.savez(tmp_path / "o.npz", X=np.array([{"a": 1}] * 4, dtype=object), y=np.arange(4))
    result = invoke("check", recipe_for(tmp_path, "o.npz"), "--no-probe")
    assert result.exit_code == 2 and "pickled" in result.stderr


def test_recipe_new_for_tabular_npz_writes_an_mlp(tmp_path):
    rng = np.random.default_rng(1)
    np.savez(tmp_path / "t.npz", X=rng.normal(size=(60, 3)), y=np.arange(60) % 3)
    out = tmp_path / "t.toml"
    result = invoke("new", tmp_path / "t.npz", "--out", out)
    assert result.exit_code == 0, result.output
    assert 'kind = "cnn"' not in out.read_text()
