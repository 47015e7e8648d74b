"""parquet_reader: a Parquet file reads as the same dataset as the CSV of the same table,
with nulls as empty cells and the same checks; without pyarrow, an install hint."""

import sys

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from conftest import DATA, invoke, write_recipe

from runner.datasets.sources import load_dataset
from runner.datasets.splits import split_and_scale
from runner.recipe.loader import resolve


def settings(**data):
    return resolve({"data": data}, {}).data


def iris_table():
    lines = [l for l in (DATA / "iris_sample.csv").read_text().splitlines() if l and not l.startswith("#")]
    header = lines[0].split(",")
    rows = [l.split(",") for l in lines[1:]]
    columns = {h: [r[i] for r in rows] for i, h in enumerate(header)}
    arrays = {h: pa.array([float(v) for v in vals]) for h, vals in columns.items() if h != "species"}
    arrays["species"] = pa.array(columns["species"])
    return pa.table(arrays)


def test_parquet_equals_the_csv_of_the_same_table(tmp_path):
    """iris_sample.csv and a Parquet file of its values (float64 columns, a string
    target, written by pyarrow) give the same X, y, classes and feature names."""
    pq.write_table(iris_table(), tmp_path / "iris.parquet")
    a = load_dataset(settings(source="iris.parquet", target="species"), tmp_path)
    b = load_dataset(settings(source=str(DATA / "iris_sample.csv"), target="species"), tmp_path)
    assert np.array_equal(a.X, b.X) and np.array_equal(a.y, b.y)
    assert a.classes == b.classes and a.feature_names == b.feature_names


def test_nulls_are_empty_cells_and_categories_are_text(tmp_path):
    """Nulls in a float column and in a dictionary-encoded string column are the empty
    cells data.missing = "impute" fills; the layout is the CSV's for the same cells."""
    n = 40
    rng = np.random.default_rng(2)
    temp = [None if i % 9 == 0 else float(v) for i, v in enumerate(rng.normal(20, 3, n).round(3))]
    soil = [None if i % 11 == 3 else s for i, s in enumerate(rng.choice(["clay", "loam"], n))]
    label = [int(v) for v in rng.integers(0, 2, n)]
    table = pa.table({"temp": temp, "soil": pa.array(soil).dictionary_encode(), "y": label})
    pq.write_table(table, tmp_path / "g.parquet")
    cells = lambda v: "" if v is None else str(v)
    rows = ["temp,soil,y"] + [f"{cells(t)},{cells(s)},{y}" for t, s, y in zip(temp, soil, label)]
    (tmp_path / "g.csv").write_text("\n".join(rows) + "\n")
    opts = {"target": "y", "categorical": "onehot", "missing": "impute"}
    a = load_dataset(settings(source="g.parquet", **opts), tmp_path)
    b = load_dataset(settings(source="g.csv", **opts), tmp_path)
    assert a.feature_names == b.feature_names == ("temp", "temp (missing)", "soil=clay", "soil=loam", "soil (missing)")
    assert np.array_equal(a.X, b.X, equal_nan=True) and np.array_equal(a.y, b.y)
    data = settings(source="g.parquet", **opts)
    assert np.array_equal(split_and_scale(a, data, 1).X_val, split_and_scale(b, data, 1).X_val)


def parquet_recipe(tmp_path):
    return write_recipe(
        tmp_path,
        """
        name = "pq"
        [data]
        source = "t.parquet"
        target = "y"
        """,
    )


@pytest.mark.parametrize(
    ("table", "phrase"),
    [
        (
            pa.table({"a": [1.0, float("nan")], "y": [0, 1]}),
            't.parquet (row 2): column "a" has an infinite or NaN value',
        ),
        (pa.table({"a": [1.0, 2.0], "y": [0, None]}), 't.parquet (row 2): target column "y" has an empty cell'),
        (pa.table({"a": [1.0, 2.0], "b": ["x", "y"], "y": [0, 1]}), 'column "b" is not numeric'),
        (
            pa.table({"a": [[1], [2]], "y": [0, 1]}),
            'column "a" has type list<',
        ),
        (pa.table({"a": [1.0, 2.0], "z": [0, 1]}), 'target column not in the Parquet file\'s columns, got "y"'),
    ],
)
def test_bad_parquet_cells_are_refused_like_csv(tmp_path, table, phrase):
    pq.write_table(table, tmp_path / "t.parquet")
    result = invoke("check", parquet_recipe(tmp_path), "--no-probe")
    assert result.exit_code == 2 and "Traceback" not in result.output
    assert phrase in result.stderr, result.stderr


def test_damaged_parquet_is_refused(tmp_path):
    (tmp_path / "t.parquet").write_bytes(b"PAR1 not really a parquet file PAR1")
    result = invoke("check", parquet_recipe(tmp_path), "--no-probe")
    assert result.exit_code == 2 and "not a readable Parquet file" in result.stderr


def test_missing_pyarrow_gives_the_install_hint(tmp_path, monkeypatch):
    pq.write_table(pa.table({"a": [1.0, 2.0], "y": [0, 1]}), tmp_path / "t.parquet")
    monkeypatch.setitem(sys.modules, "pyarrow", None)  # an import of pyarrow now fails, as without it
    monkeypatch.setitem(sys.modules, "pyarrow.parquet", None)
    result = invoke("check", parquet_recipe(tmp_path), "--no-probe")
    assert result.exit_code == 2
    assert "needs pyarrow, which is not installed" in result.stderr and '".[parquet]"' in result.stderr


def test_recipe_new_guesses_the_target_of_a_parquet_file(tmp_path):
    pq.write_table(iris_table(), tmp_path / "iris.parquet")
    out = tmp_path / "iris.toml"
    result = invoke("new", tmp_path / "iris.parquet", "--out", out)
    assert result.exit_code == 0, result.output
    assert 'target = "species"' in out.read_text()
