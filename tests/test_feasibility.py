"""feasibility: every split the grid will make is made before training, by `recipe check`
and `recipe run`, so an impossible one is one error, not every job failing at run time."""

import numpy as np
from conftest import invoke, write_recipe

from runner.datasets.feasibility import check_splits
from runner.datasets.sources import load_dataset
from runner.errors import DataError
from runner.recipe.loader import resolve


def write_csv(path, labels):
    rng = np.random.default_rng(0)
    rows = ["a,b,y"] + [f"{rng.normal():.4f},{rng.normal():.4f},{c}" for c in labels]
    path.write_text("\n".join(rows) + "\n")


def recipe_for(tmp_path, split, factors=""):
    return write_recipe(
        tmp_path,
        f"""
        name = "feasible"
        seeds = [1, 2, 3]
        [data]
        source = "d.csv"
        target = "y"
        split = {split}
        [model]
        hidden = [4]
        [train]
        epochs = 1
        {factors}
        """,
    )


def refused(tmp_path, recipe, *phrases):
    for args in (("check", recipe, "--no-probe"), ("run", recipe, "--workers", "1")):
        result = invoke(*args)
        assert result.exit_code == 2, result.output
        message = result.stderr.strip()
        assert "\n" not in message and "Traceback" not in result.output
        for phrase in phrases:
            assert phrase in message, (phrase, message)
    assert not (tmp_path / "runs").exists()


def test_class_with_one_row_under_stratification(tmp_path):
    """sklearn's StratifiedShuffleSplit needs two rows of each class; the error names the
    class, the setting, its line, and that stratify = false would split these rows."""
    write_csv(tmp_path / "d.csv", ["a", "b"] * 20 + ["rare"])
    recipe = recipe_for(tmp_path, "{ val = 0.2, test = 0.2, stratify = true }")
    refused(
        tmp_path,
        recipe,
        "r.toml:7: data.split: cannot split 41 rows as asked (val = 0.2, test = 0.2, stratify = true) for seed 1",
        'class "rare" has 1 row',
        "stratify = false splits these rows",
    )


def test_three_rows_in_all(tmp_path):
    write_csv(tmp_path / "d.csv", ["a", "b", "a"])
    recipe = recipe_for(tmp_path, "{ val = 0.3, test = 0.3, stratify = false }")
    refused(tmp_path, recipe, "with 3 rows, the training split of seed 1 (val = 0.3, test = 0.3) would have 1 row")
    write_csv(tmp_path / "d.csv", ["a", "b"])
    refused(tmp_path, recipe, "cannot split 2 rows", "train, val and test each need at least one row")


def test_infeasible_level_of_a_factor_names_its_configuration(tmp_path):
    """Only one level of "data.split.val" fails (too few validation rows for three classes
    under stratification): the message names that configuration."""
    write_csv(tmp_path / "d.csv", ["a", "b"] * 20 + ["rare"] * 3)
    recipe = recipe_for(tmp_path, "{ val = 0.2, test = 0.2 }", factors='[factors]\n"data.split.val" = [0.2, 0.04]')
    refused(tmp_path, recipe, "fewer rows than the 3 classes", "in the configuration data.split.val = 0.04")


def test_feasible_grid_passes_and_runs(tmp_path):
    write_csv(tmp_path / "d.csv", ["a", "b"] * 20 + ["rare", "rare", "rare"])
    recipe = recipe_for(tmp_path, "{ val = 0.2, test = 0.2, stratify = true }")
    result = invoke("run", recipe, "--workers", "1", "-q")
    assert result.exit_code == 0, result.output


def test_check_agrees_with_the_split_jobs_make(tmp_path):
    """Over many small datasets and seeds, check_splits (which splits a one-column stand-in
    for X) refuses exactly the data that split_and_scale on the real X cannot split for
    some seed, and always as a data.split error."""
    from runner.datasets.splits import split_and_scale

    rng = np.random.default_rng(5)
    for trial in range(40):
        n = int(rng.integers(3, 12))
        labels = rng.integers(0, 3, size=n)
        write_csv(tmp_path / "d.csv", [f"c{v}" for v in labels])
        split = {"val": float(rng.choice([0.1, 0.2, 0.3])), "test": float(rng.choice([0.0, 0.2])), "stratify": True}
        data = resolve({"data": {"source": "d.csv", "target": "y", "split": split}}, {}).data
        try:
            ds = load_dataset(data, tmp_path)
        except DataError:
            continue  # one class only
        expected_ok = True
        for seed in (1, 2):
            try:
                split_and_scale(ds, data, seed)
            except DataError:
                expected_ok = False
        try:
            check_splits(ds, data, (1, 2))
            ok = True
        except DataError as err:
            ok = False
            assert err.key == "data.split", err.message()
            if "training split" in err.problem:  # made, but nothing to learn from
                continue
        assert ok == expected_ok, (trial, n, labels, split)
