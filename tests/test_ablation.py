"""ablation and the rendered leaderboard, on a store filled with known per-seed values.

The values below are invented for these checks (not results of training): they make every
table computable by hand.
"""

import pytest
from conftest import DATA, write_recipe

from runner.evidence.ablation import ablation
from runner.evidence.leaderboard import leaderboard
from runner.outputs.text import render, render_ablation
from runner.recipe.grid import expand
from runner.recipe.loader import load_recipe
from runner.store.database import Store
from runner.store.lock import RunnerLock
from runner.training.job import JobResult

# (optimizer, l2) -> val accuracy for seeds 1, 2, 3 (invented values)
VALUES = {
    ("sgd", 0.0): (0.80, 0.82, 0.78),
    ("sgd", 0.001): (0.81, 0.84, 0.80),
    ("adam", 0.0): (0.90, 0.91, 0.86),
    ("adam", 0.001): (0.88, 0.90, 0.89),
}
T_2DF = 4.3027  # two-sided 95% Student t critical value, 2 df (standard t table)

RECIPE = """
    name = "known"
    seeds = [1, 2, 3]
    [data]
    source = "iris"
    [factors]
    "train.optimizer" = ["sgd", "adam"]
    "train.l2" = [0.0, 0.001]
    [baseline]
    "train.optimizer" = "sgd"
    "train.l2" = 0.0
"""


def known_store(tmp_path):
    grid = expand(load_recipe(write_recipe(tmp_path, RECIPE)))
    store = Store(tmp_path / "known.sqlite")
    with RunnerLock(store):  # results are written only under the runner lock
        _fill(grid, store)
    return grid, store


def _fill(grid, store):
    for job in grid:
        a = job.config.assignments
        v = VALUES[(a["train.optimizer"], a["train.l2"])][grid.recipe.seeds.index(job.seed)]
        result = JobResult(
            key=job.key,
            status="done",
            metrics={"val": {"accuracy": v}, "test": {"accuracy": v - 0.01}},
            curves={"val_accuracy": [v / 2, v], "train_loss": [1.0, 0.5]},
            diagnostics={"gap": 0.02, "zero_fraction": 0.0, "near_zero_fraction": 0.1},
            epochs_run=2,
        )
        store.write_result(job, grid.labels(job.config), grid.recipe.hash, result)


def mean(xs):
    return sum(xs) / len(xs)


def test_main_effect_equals_hand_computation(tmp_path):
    grid, store = known_store(tmp_path)
    ab = ablation(grid, store).to_json()
    opt = ab["main_effects"][0]
    assert opt["factor"] == "train.optimizer" and opt["baseline"] == "sgd"
    sgd, adam = opt["levels"]
    # sgd averaged over l2 per seed: 0.805, 0.83, 0.79
    assert sgd["mean"] == pytest.approx(mean([0.805, 0.83, 0.79]))
    assert adam["mean"] == pytest.approx(mean([0.89, 0.905, 0.875]))
    # matched differences adam - sgd, averaged within each seed: 0.085, 0.075, 0.085
    d = [0.085, 0.075, 0.085]
    sd = (sum((x - mean(d)) ** 2 for x in d) / 2) ** 0.5
    half = T_2DF * sd / 3**0.5
    got = adam["diff_vs_baseline"]
    assert got["diff_mean"] == pytest.approx(mean(d))
    assert got["ci95"] == [pytest.approx(mean(d) - half, abs=1e-5), pytest.approx(mean(d) + half, abs=1e-5)]
    assert got["n_pairs"] == 6 and got["n_seeds"] == 3
    assert sgd["diff_vs_baseline"] is None
    # the level's own interval over its three per-seed means
    ps = [0.805, 0.83, 0.79]
    sd = (sum((x - mean(ps)) ** 2 for x in ps) / 2) ** 0.5
    assert sgd["ci95"][1] - sgd["ci95"][0] == pytest.approx(2 * T_2DF * sd / 3**0.5, abs=1e-5)


def test_one_at_a_time_and_interaction(tmp_path):
    grid, store = known_store(tmp_path)
    ab = ablation(grid, store).to_json()
    ofat = {r["label"]: r for r in ab["one_at_a_time"]["rows"]}
    # adam with l2 0 against the baseline sgd with l2 0, paired by seed: 0.10, 0.09, 0.08
    assert ofat["adam"]["diff_mean"] == pytest.approx(0.09)
    assert ofat["0.001"]["diff_mean"] == pytest.approx(mean([0.01, 0.02, 0.02]))
    inter = ab["interactions"][0]
    assert inter["means"]["0"]["adam"] == pytest.approx(mean(VALUES[("adam", 0.0)]))
    assert inter["best_a_by_b"] == {"0": "adam", "0.001": "adam"} and inter["depends"] is False


def test_optimization_view_epochs_to_95_percent(tmp_path):
    grid, store = known_store(tmp_path)
    view = ablation(grid, store).to_json()["optimization"]
    # curves go v/2 then v: 95% of the best is first reached at epoch 2
    assert {r["epochs_to_95pct"] for r in view} == {2.0}
    assert {r["final_train_loss"] for r in view} == {0.5}


def test_leaderboard_top_group_on_known_values(tmp_path):
    grid, store = known_store(tmp_path)
    doc = leaderboard(grid, store).to_json()
    assert [r["labels"]["train.optimizer"] for r in doc["rows"]] == ["adam", "adam", "sgd", "sgd"]
    best = doc["rows"][0]
    assert best["vs_best"] is None and best["top_group"] is True
    for row in doc["rows"][1:]:
        assert set(row["vs_best"]) >= {"diff_mean", "ci95", "p_value", "p_holm"}
        assert row["top_group"] == (row["vs_best"]["p_holm"] >= 0.05)


def test_golden_markdown_leaderboard(tmp_path):
    """The rendered markdown leaderboard and ablation, byte for byte (format drift check)."""
    grid, store = known_store(tmp_path)
    doc = leaderboard(grid, store)
    text = render(doc, "markdown") + render_ablation(doc.ablation, markdown=True)
    golden = DATA / "golden_board.md"
    assert text == golden.read_text()
