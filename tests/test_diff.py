"""diff: two leaderboards matched by level labels, Welch intervals, verdicts, CI gate."""

import json

import pytest
from conftest import invoke, write_recipe
from scipy import stats as st

RECIPE = """
    name = "cmp"
    seeds = [1, 2, 3]
    [data]
    source = "iris"
    [model]
    hidden = [16]
    [train]
    epochs = 8
    batch_size = 16
    [factors.opt]
    labels = ["sgd", "adam"]
    "train.optimizer" = ["sgd", "adam"]
    "train.lr" = [0.1, 0.01]
"""


@pytest.fixture
def two_runs(tmp_path):
    recipe = write_recipe(tmp_path, RECIPE)
    a, b = tmp_path / "a.sqlite", tmp_path / "b.sqlite"
    for store in (a, b):
        assert invoke("run", recipe, "--store", store, "-q", "--workers", 1).exit_code == 0
    return recipe, a, b


def test_same_recipe_twice_is_no_clear_change(two_runs):
    recipe, a, b = two_runs
    result = invoke("diff", a, b, "--format", "json", "--fail-on-worse")
    assert result.exit_code == 0
    d = json.loads(result.stdout)
    assert d["format"] == "recipe-diff"
    assert {c["verdict"] for c in d["configs"]} == {"no clear change"}
    assert all(c["old"]["mean"] == c["new"]["mean"] for c in d["configs"])
    assert d["changes"] == [] and d["only_old"] == [] and d["only_new"] == []


def test_diverging_learning_rate_is_worse_and_gates(two_runs, tmp_path):
    recipe, a, _ = two_runs
    recipe.write_text(recipe.read_text().replace("[0.1, 0.01]", "[1e6, 0.01]"))
    c = tmp_path / "c.sqlite"
    assert invoke("run", recipe, "--store", c, "-q", "--workers", 1).exit_code == 0
    result = invoke("diff", a, c, "--format", "json", "--fail-on-worse")
    assert result.exit_code == 1
    d = json.loads(result.stdout)
    verdicts = {c["labels"]["opt"]: c["verdict"] for c in d["configs"]}
    assert verdicts == {"sgd": "worse", "adam": "no clear change"}
    assert invoke("diff", a, c).exit_code == 0  # without the gate option, exit 0
    table = invoke("diff", a, c).stdout
    assert "worse (no finished seed in new (3 diverged, 0 failed))" in table


def test_json_exports_and_welch_interval(two_runs, tmp_path):
    """Diff of JSON exports; a changed base setting is listed and the interval is Welch's
    (scipy.stats.ttest_ind with equal_var=False)."""
    recipe, a, _ = two_runs
    old = tmp_path / "old.json"
    assert invoke("board", recipe, "--store", a, "--format", "json", "--out", old).exit_code == 0
    recipe.write_text(recipe.read_text().replace("epochs = 8", "epochs = 30"))
    c = tmp_path / "c.sqlite"
    invoke("run", recipe, "--store", c, "-q", "--workers", 1)
    new = tmp_path / "new.json"
    invoke("board", recipe, "--store", c, "--format", "json", "--out", new)
    d = json.loads(invoke("diff", old, new, "--format", "json").stdout)
    assert {"what": "train.epochs", "old": 8, "new": 30} in d["changes"]
    olddoc, newdoc = json.loads(old.read_text()), json.loads(new.read_text())
    checked = 0
    for cfg in d["configs"]:
        o = [r for r in olddoc["rows"] if r["labels"] == cfg["labels"]][0]
        n = [r for r in newdoc["rows"] if r["labels"] == cfg["labels"]][0]
        x, y = list(n["per_seed"].values()), list(o["per_seed"].values())
        if len(set(x) | set(y)) > 1:
            ref = st.ttest_ind(x, y, equal_var=False)
            assert cfg["p_value"] == pytest.approx(ref.pvalue, rel=1e-9)
            checked += 1
    assert checked >= 1


def test_diff_bad_input(tmp_path):
    bad = tmp_path / "x.json"
    bad.write_text("{}")
    result = invoke("diff", bad, bad)
    assert result.exit_code == 2 and 'not a "recipe-leaderboard" document' in result.stderr
    result = invoke("diff", tmp_path / "missing.json", bad)
    assert result.exit_code == 2 and "file not found" in result.stderr
