"""grid: Cartesian product of levels times seeds, linked factors, exclusions, stable keys."""

import shutil
import sqlite3

from conftest import DATA, invoke, write_recipe

from runner.recipe.grid import expand
from runner.recipe.loader import load_recipe

BASE = """
    name = "g"
    seeds = [1, 2, 3]
    [data]
    source = "iris"
    [train]
    epochs = 2
"""


def test_product_times_seeds_and_indexing(tmp_path):
    grid = expand(
        load_recipe(
            write_recipe(
                tmp_path,
                BASE
                + """
    [factors]
    "train.optimizer" = ["sgd", "adam", "momentum"]
    "train.l2" = [0.0, 1e-3]
    """,
            )
        )
    )
    assert len(grid.configs) == 6 and len(grid) == 18
    jobs = list(grid)
    assert len({j.key for j in jobs}) == 18
    assert grid[-1].key == jobs[-1].key and grid[4].seed == 2
    assert {(j.config.assignments["train.optimizer"], j.config.assignments["train.l2"]) for j in jobs} == {
        (o, l) for o in ("sgd", "adam", "momentum") for l in (0.0, 1e-3)
    }


def test_linked_factor_and_exclusion(tmp_path):
    grid = expand(
        load_recipe(
            write_recipe(
                tmp_path,
                BASE
                + """
    [factors.optimizer]
    "train.optimizer" = ["sgd", "sgd", "adam"]
    "train.lr" = [0.1, 0.01, 0.001]
    [factors]
    "model.dropout" = [0.0, 0.5]
    [[exclude]]
    "train.optimizer" = "adam"
    "model.dropout" = 0.5
    """,
            )
        )
    )
    pairs = sorted((c.settings.train.optimizer, c.settings.train.lr, c.settings.model.dropout) for c in grid.configs)
    assert pairs == [("adam", 0.001, 0.0), ("sgd", 0.01, 0.0), ("sgd", 0.01, 0.5), ("sgd", 0.1, 0.0), ("sgd", 0.1, 0.5)]


def test_keys_are_stable_and_adding_a_level_keeps_old_keys(tmp_path):
    one = write_recipe(tmp_path, BASE + '[factors]\n"train.lr" = [0.1, 0.01]\n', "a.toml")
    two = write_recipe(tmp_path, BASE + '[factors]\n"train.lr" = [0.1, 0.01, 0.001]\n', "b.toml")
    keys_a = {j.key for j in expand(load_recipe(one))}
    assert keys_a == {j.key for j in expand(load_recipe(one))}
    keys_b = {j.key for j in expand(load_recipe(two))}
    assert keys_a < keys_b and len(keys_b - keys_a) == 3


def test_changing_the_data_changes_every_key(tmp_path):
    shutil.copy(DATA / "iris_sample.csv", tmp_path / "d.csv")
    text = BASE.replace('source = "iris"', 'source = "d.csv"\ntarget = "species"')
    path = write_recipe(tmp_path, text)
    before = {j.key for j in expand(load_recipe(path))}
    with open(tmp_path / "d.csv", "a") as f:
        f.write("5.0,3.4,1.5,0.2,setosa\n")
    after = {j.key for j in expand(load_recipe(path))}
    assert before.isdisjoint(after)


def test_adding_a_level_reruns_only_the_new_configuration(tmp_path):
    path = write_recipe(tmp_path, BASE + '[factors]\n"train.lr" = [0.1, 0.01]\n')
    store = tmp_path / "s.sqlite"
    assert invoke("run", path, "--store", store, "--workers", 1, "-q").exit_code == 0
    path.write_text(path.read_text().replace("[0.1, 0.01]", "[0.1, 0.01, 0.05]"))
    result = invoke("run", path, "--store", store, "--workers", 1)
    assert "9 jobs, 6 done, 3 to run" in result.stderr
    again = invoke("run", path, "--store", store, "--workers", 1)
    assert "9 jobs, 9 done, 0 to run" in again.stderr


def test_rank_by_is_part_of_a_job_only_when_early_stopping_watches_it(tmp_path):
    """Changing rank_by reruns nothing without early stopping (the audit found every job
    rerun); with train.patience > 0 the monitored metric decides the epochs, so it reruns."""
    from conftest import write_recipe

    def keys(rank_by, patience):
        text = f"""
            name = "k"
            rank_by = "{rank_by}"
            [data]
            source = "iris"
            [train]
            patience = {patience}
        """
        return [j.key for j in expand(load_recipe(write_recipe(tmp_path, text)))]

    assert keys("val.accuracy", 0) == keys("val.log_loss", 0)
    assert keys("val.accuracy", 3) != keys("val.log_loss", 3)


def test_exclusion_of_a_list_valued_level_matches(tmp_path):
    """An [[exclude]] rule on a list-valued factor ("model.hidden" = [4]) skips exactly the
    configurations it names: nothing excluded is planned, run or stored."""
    path = write_recipe(
        tmp_path,
        BASE
        + """
    [factors]
    "model.hidden" = [[4], [8, 8]]
    "train.optimizer" = ["sgd", "adam"]
    [[exclude]]
    "model.hidden" = [4]
    "train.optimizer" = "sgd"
    """,
    )
    check = invoke("check", path, "--no-probe")
    assert check.exit_code == 0 and "3 configurations x 3 seeds = 9 jobs" in check.stdout
    store = tmp_path / "s.sqlite"
    assert invoke("run", path, "--store", store, "--workers", 1, "-q").exit_code == 0
    with sqlite3.connect(store) as c:
        levels = {r[0] for r in c.execute("SELECT levels FROM jobs")}
    assert len(levels) == 3 and '{"model.hidden": "[4]", "train.optimizer": "sgd"}' not in levels
