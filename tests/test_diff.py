"""diff: two leaderboards matched by level labels, Welch intervals, verdicts, CI gate."""

import json

import numpy as np
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
    assert {c["verdict"] for c in d["configs"]} == {"no shift shown"}
    assert all(c["p_value"] == 1.0 for c in d["configs"])  # identical runs: never p = 0
    assert d["method"].startswith("paired by seed over 3 shared seeds")
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
    assert verdicts == {"sgd": "regressed", "adam": "no shift shown"}
    assert invoke("diff", a, c).exit_code == 0  # without the gate option, exit 0
    table = invoke("diff", a, c).stdout
    assert "sgd: a seed diverged, failed or timed out in the new run" in table


def test_json_exports_pair_by_seed_with_the_corrected_t(two_runs, tmp_path):
    """Diff of JSON exports of the same seeds, data and split: changes are paired by seed; the
    split is redrawn per seed, so the paired t uses the variance (1/n + n_val/n_train) s^2
    (Nadeau & Bengio 2003; scipy.stats.t for the tail); a changed base setting is listed."""
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
    assert d["method"].startswith("paired by seed")
    olddoc, newdoc = json.loads(old.read_text()), json.loads(new.read_text())
    v = 1 / 3 + newdoc["protocol"]["n_val"] / newdoc["protocol"]["n_train"]
    checked = 0
    for cfg in d["configs"]:
        o = next(r for r in olddoc["rows"] if r["labels"] == cfg["labels"])["per_seed"]
        n = next(r for r in newdoc["rows"] if r["labels"] == cfg["labels"])["per_seed"]
        diffs = np.array([n[s] - o[s] for s in sorted(o)])
        if diffs.std(ddof=1) > 0:
            t_stat = diffs.mean() / (diffs.std(ddof=1) * np.sqrt(v))
            assert cfg["p_value"] == pytest.approx(2 * st.t.sf(abs(t_stat), 2), rel=1e-9)
            checked += 1
    assert checked >= 1


def test_other_seeds_do_not_pair_and_the_welch_interval_is_used(two_runs, tmp_path):
    """Different seeds on the two sides: no pairing, Welch's t (scipy.stats.ttest_ind with
    equal_var=False), and the header says so."""
    recipe, a, _ = two_runs
    recipe.write_text(recipe.read_text().replace("seeds = [1, 2, 3]", "seeds = [4, 5, 6]"))
    c = tmp_path / "c.sqlite"
    assert invoke("run", recipe, "--store", c, "-q", "--workers", 1).exit_code == 0
    d = json.loads(invoke("diff", a, c, "--format", "json").stdout)
    assert "seeds do not pair" in d["method"] or "too few to pair" in d["method"]
    checked = 0
    for cfg in d["configs"]:
        if cfg["ci95"] is not None:
            checked += 1
            assert "Welch" in cfg["reason"]
    assert checked >= 1


def test_min_change_keeps_small_shifts_from_failing_the_gate(two_runs, tmp_path):
    """A change smaller than --min-change is never called a regression."""
    recipe, a, _ = two_runs
    recipe.write_text(recipe.read_text().replace("epochs = 8", "epochs = 7"))
    c = tmp_path / "c.sqlite"
    assert invoke("run", recipe, "--store", c, "-q", "--workers", 1).exit_code == 0
    result = invoke("diff", a, c, "--format", "json", "--fail-on-worse", "--min-change", 1.0)
    assert result.exit_code == 0
    assert "regressed" not in {c["verdict"] for c in json.loads(result.stdout)["configs"]}


def test_diff_bad_input(tmp_path):
    bad = tmp_path / "x.json"
    bad.write_text("{}")
    result = invoke("diff", bad, bad)
    assert result.exit_code == 2 and 'not a "recipe-leaderboard" document' in result.stderr
    result = invoke("diff", tmp_path / "missing.json", bad)
    assert result.exit_code == 2 and "file not found" in result.stderr
