"""api: the notebook API's tables hold the board's own numbers, and run() resumes the same
store the CLI uses."""

import json
import sqlite3

import pytest
from conftest import invoke, write_recipe

pd = pytest.importorskip("pandas")

from runner.api import open_study, run  # noqa: E402

RECIPE = """
    name = "nb"
    seeds = [1, 2, 3]
    [data]
    source = "wine"
    [model]
    hidden = [16]
    [train]
    epochs = 5
    [factors]
    "train.optimizer" = ["sgd", "adam"]
    "train.lr" = [0.01, 0.003]
"""


def test_tables_equal_the_board_json_and_the_store(tmp_path):
    path = write_recipe(tmp_path, RECIPE)
    store = tmp_path / "s.sqlite"
    study = run(path, store=store, workers=1, quiet=True)
    again = invoke("run", path, "--store", store, "--workers", 1)
    assert again.exit_code == 0 and "12 jobs, 12 done, 0 to run" in again.stderr  # the CLI resumes the API's store
    doc = json.loads(invoke("board", path, "--store", store, "--format", "json").stdout)
    board = open_study(path, store).leaderboard()
    assert list(board["config_id"]) == [r["config_id"] for r in doc["rows"]]
    for row, (_, got) in zip(doc["rows"], board.iterrows()):
        assert (
            got["rank"] == row["rank"]
            and got["n"] == row["n"]
            and got["train.optimizer"] == row["labels"]["train.optimizer"]
        )
        assert got["mean"] == row["mean"] and got["std"] == row["std"] and got["test_mean"] == row["test_mean"]
        assert [got["ci95_low"], got["ci95_high"]] == row["ci95"]
        vs = row["vs_best"]
        if vs is None:
            assert pd.isna(got["vs_best"])
        else:
            assert got["vs_best.diff_mean"] == vs["diff_mean"] and got["vs_best.p_holm"] == vs["p_holm"]
        assert got["counts.done"] == row["counts"]["done"]
        assert got["flags"] == "; ".join(f["text"] for f in row["flags"])
    metrics = study.metrics()
    val = metrics[(metrics.split == "val") & (metrics.metric == "accuracy")]
    for row in doc["rows"]:
        mine = val[val.config_id == row["config_id"]]
        assert {str(s): v for s, v in zip(mine.seed, mine.value)} == row["per_seed"]
    main = study.ablation()["main_effects"]
    for eff in doc["ablation"]["main_effects"]:
        for lvl in eff["levels"]:
            got = main[(main.factor == eff["factor"]) & (main.label == lvl["label"])].iloc[0]
            assert got["mean"] == lvl["mean"] and [got["ci95_low"], got["ci95_high"]] == lvl["ci95"]
    curves = study.curves()
    with sqlite3.connect(store) as c:
        stored = sorted(c.execute("SELECT job_key, name, epoch, value FROM curves"))
    assert sorted(zip(curves.job_key, curves.curve, curves.epoch, curves.value)) == stored
    jobs = study.jobs()
    assert len(jobs) == 12 and set(jobs.status) == {"done"} and set(jobs.trained) == {"stacked (12)"}


def test_errors_are_user_errors_with_fields(tmp_path):
    from runner.errors import UserError

    path = write_recipe(tmp_path, RECIPE.replace("epochs = 5", "epochs = -1"))
    with pytest.raises(UserError) as err:
        run(path, store=tmp_path / "s.sqlite", workers=1)
    assert err.value.key == "train.epochs" and err.value.value == -1
