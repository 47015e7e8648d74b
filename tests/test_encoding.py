"""encoding: text and empty cells, accepted by data.categorical = "onehot" and
data.missing = "impute", give the matrix scikit-learn's OneHotEncoder, SimpleImputer and
MissingIndicator give when fitted on the same training rows; the fitted record
(Preprocessing) reproduces the split's rows and survives JSON."""

import json

import numpy as np
import pytest
from conftest import invoke, write_recipe
from sklearn.impute import MissingIndicator, SimpleImputer
from sklearn.model_selection import train_test_split
from sklearn.preprocessing import OneHotEncoder

from runner.datasets.encoding import Preprocessing
from runner.datasets.sources import load_dataset
from runner.datasets.splits import split_and_scale
from runner.recipe.loader import resolve

NUMERIC = ("temp", "humidity")
CATEGORICAL = ("soil", "vent")


def greenhouse(path, n=160, seed=0):
    """Synthetic greenhouse records (invented for the test): two numeric columns, two text
    columns, empty cells in temp and soil, a rare soil value "peat" in 3 rows."""
    rng = np.random.default_rng(seed)
    temp = rng.normal(22, 4, n).round(2).astype(str).astype(object)
    temp[rng.random(n) < 0.12] = ""
    humidity = rng.uniform(30, 90, n).round(1).astype(str)
    soil = rng.choice(["loam", "clay", "sand"], n).astype(object)
    soil[rng.choice(n, 3, replace=False)] = "peat"
    soil[rng.random(n) < 0.1] = ""
    vent = rng.choice(["open", "shut"], n)
    label = np.where(rng.random(n) < 0.5, "wilted", "thriving")
    rows = ["temp,humidity,soil,vent,state"] + [",".join(r) for r in zip(temp, humidity, soil, vent, label)]
    path.write_text("\n".join(rows) + "\n")
    return {"temp": temp, "humidity": humidity, "soil": soil, "vent": vent}


def data_settings(**extra):
    data = {"source": "g.csv", "target": "state", "categorical": "onehot", "missing": "impute", **extra}
    return resolve({"data": data}, {}).data


def sklearn_rows(ds, seed, val=0.2, test=0.2):
    idx = np.arange(len(ds.y))
    rest, test_idx = train_test_split(idx, test_size=test, random_state=0, stratify=ds.y)  # test_seed 0
    train_idx, val_idx = train_test_split(rest, test_size=val / (1 - test), random_state=seed, stratify=ds.y[rest])
    return train_idx, val_idx, test_idx


def reference(cols, train_idx, rows):
    """The encoded matrix by scikit-learn, in the tool's column order: each column, then its
    one-hot block over the file's values (values the training rows lack: zero columns),
    then its indicator when the file has an empty cell in it."""
    num = np.array([[np.nan if v == "" else float(v) for v in cols[c]] for c in NUMERIC]).T
    cat = np.array([cols[c] for c in CATEGORICAL], dtype=object).T
    num_imp = SimpleImputer(strategy="mean", add_indicator=True).fit(num[train_idx])
    cat_imp = SimpleImputer(strategy="most_frequent", missing_values="").fit(cat[train_idx])
    onehot = OneHotEncoder(handle_unknown="ignore", sparse_output=False).fit(cat_imp.transform(cat[train_idx]))
    num_ind = MissingIndicator(features="all", missing_values=np.nan).fit(num[train_idx])
    cat_ind = MissingIndicator(features="all", missing_values="").fit(cat[train_idx])
    imputed = num_imp.transform(num[rows])
    encoded = onehot.transform(cat_imp.transform(cat[rows]))
    blocks, start = [], 0
    for j, c in enumerate(NUMERIC):
        blocks.append(imputed[:, [j]])
        if (num[:, j] != num[:, j]).any():
            blocks.append(num_ind.transform(num[rows])[:, [j]])
    for j, c in enumerate(CATEGORICAL):
        values = sorted(set(cols[c]) - {""})
        block = np.zeros((len(rows), len(values)))
        for k, v in enumerate(onehot.categories_[j]):
            block[:, values.index(v)] = encoded[:, start + k]
        start += len(onehot.categories_[j])
        blocks.append(block)
        if (cat[:, j] == "").any():
            blocks.append(cat_ind.transform(cat[rows])[:, [j]])
    # SimpleImputer's own indicators (add_indicator=True) are the MissingIndicator columns
    # of the features with an empty cell in the training rows.
    own = imputed[:, len(NUMERIC) :]
    assert np.array_equal(own, num_ind.transform(num[rows])[:, num_imp.indicator_.features_])
    return np.concatenate(blocks, axis=1)


@pytest.mark.parametrize("seed", [1, 2, 3, 4])
def test_encoded_matrix_equals_sklearn(tmp_path, seed):
    cols = greenhouse(tmp_path / "g.csv")
    ds = load_dataset(data_settings(), tmp_path)
    sp = split_and_scale(ds, data_settings(scale="none"), seed)
    train_idx, val_idx, test_idx = sklearn_rows(ds, seed)
    assert np.array_equal(sp.y_val, ds.y[val_idx])
    for got, rows in ((sp.X_train, train_idx), (sp.X_val, val_idx), (sp.X_test, test_idx)):
        expected = reference(cols, train_idx, rows)
        assert got.shape == expected.shape
        # float32 storage of float64 means: equal to float32 rounding (relative 1e-6)
        np.testing.assert_allclose(got, expected, rtol=1e-6, atol=0)
    assert sp.preprocessing.feature_names == (
        "temp",
        "temp (missing)",
        "humidity",
        "soil=clay",
        "soil=loam",
        "soil=peat",
        "soil=sand",
        "soil (missing)",
        "vent=open",
        "vent=shut",
    )


def test_a_value_unseen_in_training_encodes_as_zeros(tmp_path):
    """Some seed leaves every "peat" row out of training: those rows' soil block is all zero
    (OneHotEncoder's handle_unknown="ignore"), and the record says peat was not seen."""
    cols = greenhouse(tmp_path / "g.csv")
    ds = load_dataset(data_settings(), tmp_path)
    peat = np.flatnonzero(cols["soil"] == "peat")
    for seed in range(1, 60):
        train_idx, val_idx, test_idx = sklearn_rows(ds, seed)
        if not set(peat) & set(train_idx):
            break
    else:
        pytest.fail("no seed left peat out of training")
    sp = split_and_scale(ds, data_settings(scale="none"), seed)
    soil = next(c for c in sp.preprocessing.columns if c.name == "soil")
    assert "peat" not in soil.seen and "peat" in soil.slots
    held = np.concatenate([val_idx, test_idx])
    X_held = np.concatenate([sp.X_val, sp.X_test])
    block = X_held[np.isin(held, peat)][:, 3:7]
    assert block.shape[0] > 0 and not block.any()


def test_preprocessing_reproduces_the_split_and_survives_json(tmp_path):
    """Preprocessing.transform on the val rows' raw cells gives the split's (standardized)
    X_val; the record round-trips through JSON unchanged."""
    cols = greenhouse(tmp_path / "g.csv")
    ds = load_dataset(data_settings(), tmp_path)
    sp = split_and_scale(ds, data_settings(), 2)
    _, val_idx, _ = sklearn_rows(ds, 2)
    pre = Preprocessing.from_json(json.loads(json.dumps(sp.preprocessing.to_json())))
    assert pre == sp.preprocessing
    again = pre.transform({c: list(cols[c][val_idx]) for c in cols})
    np.testing.assert_allclose(again, sp.X_val, rtol=0, atol=2e-6)


def test_width_is_the_same_for_every_seed(tmp_path):
    """The layout comes from the file, so every seed's matrix has one width (jobs of one
    configuration stay stackable)."""
    greenhouse(tmp_path / "g.csv")
    ds = load_dataset(data_settings(), tmp_path)
    widths = {split_and_scale(ds, data_settings(), s).X_train.shape[1] for s in range(1, 9)}
    assert widths == {10}


def recipe_for(tmp_path, data_extra=""):
    return write_recipe(
        tmp_path,
        f"""
        name = "greenhouse"
        seeds = [1, 2]
        [data]
        source = "g.csv"
        target = "state"
        {data_extra}
        [model]
        hidden = [8]
        [train]
        epochs = 2
        """,
    )


def test_cli_defaults_name_the_column_and_the_option(tmp_path):
    greenhouse(tmp_path / "g.csv")
    result = invoke("check", recipe_for(tmp_path), "--no-probe")
    assert result.exit_code == 2
    assert 'g.csv:2: column "soil" is not numeric, got "sand"' in result.stderr
    assert 'data.categorical = "onehot"' in result.stderr
    result = invoke("check", recipe_for(tmp_path, 'categorical = "onehot"'), "--no-probe")
    assert result.exit_code == 2
    assert 'g.csv:5: column "soil" has a missing value' in result.stderr and 'data.missing = "impute"' in result.stderr


def test_cli_runs_the_encoded_table_to_a_board(tmp_path):
    """Both seeds train in one stacked group (their widths agree), none falls back."""
    import sqlite3

    greenhouse(tmp_path / "g.csv")
    recipe = recipe_for(tmp_path, 'categorical = "onehot"\nmissing = "impute"')
    result = invoke("run", recipe, "--workers", "1", "--format", "json")
    assert result.exit_code == 0, result.output
    assert "training 1 stacked group of 2 jobs" in result.stderr
    board = json.loads(result.stdout)
    assert board["rows"][0]["n"] == 2
    with sqlite3.connect(tmp_path / "runs" / "greenhouse.sqlite") as c:
        rows = c.execute("SELECT status, diagnostics FROM jobs").fetchall()
    assert [s for s, _ in rows] == ["done", "done"] and not any("notes" in json.loads(d) for _, d in rows)


def test_a_column_empty_in_some_training_split_is_refused_up_front(tmp_path):
    """A numeric column with one value in 40 rows has none in some seed's training split:
    the fill cannot be fitted, and `recipe check` says so before anything trains."""
    rows = ["a,b,y"] + [f"{i},{'' if i else 7},{i % 2}" for i in range(40)]
    (tmp_path / "g.csv").write_text("\n".join(rows) + "\n")
    recipe = write_recipe(
        tmp_path,
        """
        name = "sparse"
        seeds = [1, 2, 3, 4, 5, 6, 7, 8, 9, 10]
        [data]
        source = "g.csv"
        target = "y"
        missing = "impute"
        """,
    )
    result = invoke("check", recipe, "--no-probe")
    assert result.exit_code == 2
    assert 'column "b" has no value in the training split' in result.stderr and "(seed" in result.stderr
