"""advice: how many seeds a question needs, through `recipe board` and `recipe check`, held
equal to statsmodels' TTestPower (two-sided paired t, noncentral t power)."""

import json
import math
import statistics

import pytest
from conftest import invoke, write_recipe
from statsmodels.stats.power import TTestPower

from runner.evidence.advice import detectable_effect
from runner.evidence.power import seeds_for_equivalence
from runner.evidence.protocols import Resampling

RECIPE = """
    name = "advice"
    seeds = [1, 2, 3, 4]
    [data]
    source = "iris"
    split = { val = 0.3, test = 0.2, validation = "fixed" }
    [model]
    hidden = [16]
    [train]
    epochs = 8
    batch_size = 16
    [factors.optimizer]
    labels = ["adam 0.01", "adam 0.003", "sgd 0.05"]
    "train.optimizer" = ["adam", "adam", "sgd"]
    "train.lr" = [0.01, 0.003, 0.05]
    [verdicts]
    margin = 0.05
"""


@pytest.mark.parametrize("n", [3, 5, 10])
def test_pilot_detectable_effect_matches_statsmodels(n):
    """TTestPower().solve_power(nobs=n, alpha=0.05, power=0.8): the effect size n pairs detect."""
    ref = TTestPower().solve_power(nobs=n, alpha=0.05, power=0.8)
    assert detectable_effect(n) == pytest.approx(ref, rel=1e-5)


def test_redrawn_splits_put_a_floor_under_what_a_pilot_detects():
    """With Var(mean) = (1/n + 1/3) s^2 (Nadeau & Bengio 2003) the noncentrality is at most
    effect * sqrt(3): a pilot needs a larger effect than on a fixed split."""
    assert detectable_effect(5, protocol=Resampling.resample(100, 300)) > detectable_effect(5)


def test_board_and_check_advise_seeds_as_statsmodels_computes_them(tmp_path):
    recipe = write_recipe(tmp_path, RECIPE)
    store = tmp_path / "s.sqlite"
    pilot = invoke("check", recipe, "--store", store, "--no-probe")
    effect = TTestPower().solve_power(nobs=4, alpha=0.05, power=0.8)
    assert f"A pilot of 4 seeds: a paired t-test at 0.05 detects a paired difference of {effect:.2f} x" in pilot.stdout
    assert "2/2^4 = 0.125" in pilot.stdout

    assert invoke("run", recipe, "--store", store, "--workers", 1, "-q").exit_code == 0
    doc = json.loads(invoke("board", recipe, "--store", store, "--format", "json").stdout)
    rows = {r["labels"]["optimizer"]: r for r in doc["rows"]}
    top = doc["rows"][0]
    assert doc["advice"], "a board with two configurations sharing seeds gives advice"
    k = len(doc["rows"])
    for a in doc["advice"]:
        other = next(r for r in doc["rows"] if r["labels"]["optimizer"] == a["config"])
        d = [other["per_seed"][s] - top["per_seed"][s] for s in top["per_seed"]]
        assert a["diff"] == pytest.approx(statistics.fmean(d)) and a["sd"] == pytest.approx(statistics.stdev(d))
        effect = abs(a["diff"]) / a["sd"]
        for key, level in (("detect", 0.05), ("detect_simultaneous", 0.05 / (k - 1))):
            ref = TTestPower().solve_power(effect_size=effect, alpha=level, power=0.8)
            assert a[key] == math.ceil(ref), (key, ref)
        tost = seeds_for_equivalence(0.05, a["sd"], a["diff"])
        assert a["equivalence"] == tost.seeds
    assert doc["advice"][0]["config"] == doc["rows"][1]["labels"]["optimizer"]  # the runner-up first
    assert set(rows) >= {a["config"] for a in doc["advice"]}
    board = invoke("board", recipe, "--store", store).stdout
    assert "Seeds advice: to separate" in board and "to show them within +-0.05" in board
    check = invoke("check", recipe, "--store", store, "--no-probe").stdout
    assert "Seeds advice: to separate" in check and "A pilot" not in check
