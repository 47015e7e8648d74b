"""data: bundled datasets, CSV parsing, seeded splits, scaling fitted on training rows only."""

import numpy as np
import pytest
from conftest import DATA
from sklearn.model_selection import train_test_split

from runner.datasets.sources import load_dataset
from runner.datasets.splits import split_and_scale
from runner.errors import DataError
from runner.recipe.loader import resolve


def settings(**data):
    return resolve({"data": data}, {}).data


def test_digits_shape_and_classes():
    """scikit-learn's bundled digits: 1797 images of 8x8, 10 classes (sklearn docs)."""
    ds = load_dataset(settings(source="digits"), DATA)
    assert ds.X.shape == (1797, 1, 8, 8)
    assert len(ds.classes) == 10 and ds.task == "classification"
    assert ds.X.max() == 16 and ds.X.min() == 0


def test_bundled_shapes():
    """Shapes of the bundled sets: iris 150x4, wine 178x13, breast_cancer 569x30, diabetes 442x10."""
    shapes = {
        name: load_dataset(settings(source=name), DATA).X.shape
        for name in ("iris", "wine", "breast_cancer", "diabetes")
    }
    assert shapes == {"iris": (150, 4), "wine": (178, 13), "breast_cancer": (569, 30), "diabetes": (442, 10)}
    assert load_dataset(settings(source="diabetes"), DATA).task == "regression"


def test_split_matches_sklearn_stratified_80_20():
    """With test = 0, val 0.2 and seed 0, the split is sklearn's stratified 80/20 (1437/360)."""
    ds = load_dataset(settings(source="digits"), DATA)
    sp = split_and_scale(ds, settings(source="digits", split={"val": 0.2, "test": 0.0}), seed=0)
    assert len(sp.y_train) == 1437 and len(sp.y_val) == 360
    _, _, _, y_ref = train_test_split(ds.X, ds.y, test_size=0.2, random_state=0, stratify=ds.y)
    assert np.array_equal(np.sort(sp.y_val), np.sort(y_ref))
    counts = np.bincount(sp.y_val, minlength=10)
    assert np.all(np.abs(counts - np.bincount(ds.y) * 0.2) <= 1)


@pytest.mark.parametrize("stratify", [True, False])
def test_split_rows_are_exactly_sklearn_train_test_split(stratify):
    """Row for row and in order, the splits are sklearn's train_test_split applied twice: the
    test rows first with test_seed (the same rows for every job), then val from the rest
    with the job's seed, stratified or not."""
    ds = load_dataset(settings(source="wine"), DATA)
    data = settings(source="wine", split={"val": 0.2, "test": 0.25, "stratify": stratify, "test_seed": 11})
    sp = split_and_scale(ds, data, seed=7)
    idx = np.arange(len(ds.y))
    rest, test_idx = train_test_split(idx, test_size=0.25, random_state=11, stratify=ds.y if stratify else None)
    train_idx, val_idx = train_test_split(
        rest, test_size=0.2 / 0.75, random_state=7, stratify=ds.y[rest] if stratify else None
    )
    for got, rows in ((sp.y_train, train_idx), (sp.y_val, val_idx), (sp.y_test, test_idx)):
        assert np.array_equal(got, ds.y[rows])
    flat = ds.X.reshape(len(ds.X), -1)
    expect = (flat[train_idx] - sp.scaler_mean) / flat[train_idx].std(axis=0)
    assert np.allclose(sp.X_train.reshape(len(train_idx), -1), expect, atol=1e-5)


def test_standardization_uses_training_rows_only():
    """Fitted mean equals the training split's mean; digits has constant training columns
    that keep scale 1 (no NaN)."""
    ds = load_dataset(settings(source="digits"), DATA)
    data = settings(source="digits", split={"val": 0.2, "test": 0.2})
    sp = split_and_scale(ds, data, seed=3)
    flat = ds.X.reshape(len(ds.X), -1)
    idx = np.arange(len(ds.y))
    rest, _ = train_test_split(idx, test_size=0.2, random_state=0, stratify=ds.y)  # test_seed 0
    train_idx, _ = train_test_split(rest, test_size=0.25, random_state=3, stratify=ds.y[rest])
    assert np.allclose(sp.scaler_mean, flat[train_idx].mean(axis=0), atol=1e-5)
    assert not np.allclose(sp.scaler_mean, flat.mean(axis=0), atol=1e-3)
    assert np.isfinite(sp.X_train).all() and np.isfinite(sp.X_val).all()
    assert np.allclose(sp.X_train.reshape(len(sp.X_train), -1).mean(axis=0), 0, atol=1e-4)


def test_csv_text_target_is_classification_and_comments_are_skipped():
    ds = load_dataset(settings(source="iris_sample.csv", target="species"), DATA)
    assert ds.X.shape == (50, 4) and ds.classes == ("setosa", "versicolor", "virginica")


def test_csv_numeric_target_regression(tmp_path):
    lines = (DATA / "iris_sample.csv").read_text().splitlines()
    (tmp_path / "num.csv").write_text("\n".join(l.rsplit(",", 1)[0] for l in lines[1:]) + "\n")
    ds = load_dataset(settings(source="num.csv", target="petal_length"), tmp_path)
    assert ds.task == "regression" and ds.X.shape == (50, 3)


def test_csv_errors_name_the_column_and_line(tmp_path):
    bad = tmp_path / "bad.csv"
    bad.write_text("a,b,y\n1,2,0\n1,,1\n")
    with pytest.raises(DataError, match=r'bad.csv:3: column "b" has a missing value'):
        load_dataset(settings(source="bad.csv", target="y"), tmp_path)
    short = tmp_path / "short.csv"
    short.write_text("a,b,y\n1,2\n")
    with pytest.raises(DataError, match="row has 2 fields"):
        load_dataset(settings(source="short.csv", target="y"), tmp_path)


def test_the_test_rows_are_the_same_for_every_seed_and_never_in_validation():
    """The audit found 55-59% of one seed's test rows were another seed's validation rows on
    digits; now every seed's test rows are one set, disjoint from every seed's train and val."""
    ds = load_dataset(settings(source="digits"), DATA)
    data = settings(source="digits")
    splits = [split_and_scale(ds, data, seed=s) for s in range(1, 6)]
    tests = {tuple(sorted(sp.rows.test)) for sp in splits}
    assert len(tests) == 1
    test = set(next(iter(tests)))
    for sp in splits:
        assert not test & set(sp.rows.val) and not test & set(sp.rows.train)
    assert len({sp.rows.record()["test_rows"] for sp in splits}) == 1
    assert len({tuple(sorted(sp.rows.val)) for sp in splits}) == 5  # resample: each seed its own val


def test_fixed_validation_is_one_split_and_folds_are_sklearn_stratified_kfold():
    """fixed: every seed the same train/val rows. folds: fold f of seed s is sklearn's
    StratifiedKFold(k, shuffle=True, random_state=s) on the non-test rows, and the k folds
    of a seed partition them."""
    from sklearn.model_selection import StratifiedKFold

    ds = load_dataset(settings(source="wine"), DATA)
    fixed = settings(source="wine", split={"validation": "fixed"})
    vals = {tuple(split_and_scale(ds, fixed, seed=s).rows.val) for s in (1, 2, 3)}
    assert len(vals) == 1
    folds = settings(source="wine", split={"validation": "folds", "folds": 4})
    rows = [split_and_scale(ds, folds, seed=9, fold=f).rows for f in range(4)]
    rest = np.setdiff1d(np.arange(len(ds.y)), rows[0].test)
    ref = list(StratifiedKFold(4, shuffle=True, random_state=9).split(rest, ds.y[rest]))
    for got, (train, val) in zip(rows, ref):
        assert np.array_equal(got.val, rest[val]) and np.array_equal(got.train, rest[train])
    assert np.array_equal(np.sort(np.concatenate([r.val for r in rows])), rest)


def test_a_factor_over_the_target_gives_each_level_its_own_rows(tmp_path):
    """Two targets of one file are two datasets: each configuration's stored jobs trained
    on its own target (before, both got the rows of whichever was read last)."""
    from conftest import invoke, write_recipe

    from runner.recipe.grid import expand
    from runner.recipe.loader import load_recipe

    rng = np.random.default_rng(0)
    rows = ["a,b,u,v"] + [f"{x:.3f},{z:.3f},{int(x > 0)},{int(z > 0)}" for x, z in rng.normal(size=(80, 2))]
    (tmp_path / "two.csv").write_text("\n".join(rows) + "\n")
    recipe = write_recipe(
        tmp_path,
        """
        name = "two-targets"
        seeds = [1]
        [data]
        source = "two.csv"
        target = "u"
        [model]
        hidden = [4]
        [train]
        epochs = 1
        [factors]
        "data.target" = ["u", "v"]
        """,
    )
    grid = expand(load_recipe(recipe))
    first, second = (grid.datasets[c.data_id] for c in grid.configs)
    assert first.fingerprint != second.fingerprint
    assert first.feature_names == ("a", "b", "v") and second.feature_names == ("a", "b", "u")
    assert invoke("run", recipe, "--workers", "1", "-q").exit_code == 0


def test_new_data_settings_join_the_identity_only_when_set():
    """categorical, missing, image_size and color at their defaults are left out of a
    job's identity (results stored before they existed keep their keys); set to anything
    else, they are in it."""
    from runner.recipe.settings import ADDED_LATER

    base = resolve({"data": {"source": "iris"}}, {})
    assert not set(ADDED_LATER["data"]) & set(base.identity()["data"])
    for key, value in (("categorical", "onehot"), ("missing", "impute"), ("color", "rgb"), ("image_size", [4, 4])):
        changed = resolve({"data": {"source": "iris", key: value}}, {})
        assert key in changed.identity()["data"] and changed.identity() != base.identity()
