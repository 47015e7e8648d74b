"""ablation and the rendered leaderboard, on a store filled with known per-seed values.

The values below are invented for these checks (not results of training): they make every
table computable by hand.
"""

import numpy as np
import pytest
from conftest import DATA, write_recipe
from scipy import stats as st

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
    split = { validation = "fixed" }
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
    assert (opt["contexts_used"], opt["contexts_total"], opt["note"]) == (2, 2, "")
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
    assert got["n_contexts"] == 2 and got["n_seeds"] == 3
    # a fixed split: the exact sign-flip test over the 2^3 flips (scipy.stats.permutation_test)
    ref = st.permutation_test((np.array(d),), np.mean, permutation_type="samples", n_resamples=np.inf)
    assert got["p_value"] == pytest.approx(ref.pvalue) and got["p_value"] == pytest.approx(0.25)
    assert sgd["diff_vs_baseline"] is None
    # the level's own interval over its three per-seed means
    ps = [0.805, 0.83, 0.79]
    sd = (sum((x - mean(ps)) ** 2 for x in ps) / 2) ** 0.5
    assert sgd["ci95"][1] - sgd["ci95"][0] == pytest.approx(2 * T_2DF * sd / 3**0.5, abs=1e-5)


def test_a_diverged_configuration_is_left_out_of_the_main_effects(tmp_path):
    """The audit: lr = 10 was the best main-effect level while sgd at lr 10 diverged; a
    configuration with a seed that did not finish must not bias a level's mean. Here adam
    with l2 0.001 diverges on one seed: the optimizer's levels are compared only where both
    finished (l2 = 0), and the l2 levels only where both finished (sgd)."""
    grid, store = known_store(tmp_path)
    job = next(j for j in grid if j.config.assignments["train.optimizer"] == "adam"
               and j.config.assignments["train.l2"] == 0.001 and j.seed == 2)  # fmt: skip
    with RunnerLock(store):
        store.write_result(job, grid.labels(job.config), grid.recipe.hash,
                           JobResult(key=job.key, status="diverged", error="loss nan", epochs_run=1))  # fmt: skip
    ab = ablation(grid, store).to_json()
    opt, l2 = ab["main_effects"]
    assert (opt["contexts_used"], opt["contexts_total"]) == (1, 2) and "1 of 2 contexts" in opt["note"]
    assert opt["levels"][1]["mean"] == pytest.approx(mean(VALUES[("adam", 0.0)]))
    assert l2["levels"][1]["mean"] == pytest.approx(mean(VALUES[("sgd", 0.001)]))
    doc = leaderboard(grid, store).to_json()
    broken = next(r for r in doc["rows"] if not r["complete"])
    assert broken["rank"] == 4 and broken["possibly_best"] is None  # ranked below the complete rows
    assert broken["verdict"]["kind"] == "no_verdict"


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


def test_interaction_test_equals_statsmodels_anova_on_the_stored_values(tmp_path):
    """The A x B F test with seeds as blocks equals statsmodels' anova_lm on the same numbers."""
    import pandas as pd
    import statsmodels.formula.api as smf
    from statsmodels.stats.anova import anova_lm

    grid, store = known_store(tmp_path)
    inter = ablation(grid, store).to_json()["interactions"][0]
    frame = pd.DataFrame([{"A": o, "B": str(l2), "seed": s, "y": v}
                          for (o, l2), vals in VALUES.items() for s, v in zip((1, 2, 3), vals)])  # fmt: skip
    table = anova_lm(smf.ols("y ~ C(seed) + C(A) * C(B)", data=frame).fit())
    assert inter["p_value"] == pytest.approx(table.loc["C(A):C(B)", "PR(>F)"], rel=1e-9)


def test_leaderboard_verdicts_on_known_values(tmp_path):
    """The possibly-best set by hand: constrained multiple comparisons with the best with the
    studentized-range constant (Hsu 1996 form; q from scipy.stats.studentized_range):
    s^2 = residual mean square of configurations + seeds, w = q s sqrt(1/n); a row is
    possibly best iff mean_i - max_{j != i} mean_j + w >= 0. Equal means share a rank."""
    grid, store = known_store(tmp_path)
    doc = leaderboard(grid, store).to_json()
    assert [r["labels"]["train.optimizer"] for r in doc["rows"]] == ["adam", "adam", "sgd", "sgd"]
    assert [r["rank"] for r in doc["rows"]] == [1, 1, 3, 4]  # adam/0 and adam/0.001 both average 0.89
    y = np.array([VALUES[k] for k in VALUES])
    k, n = y.shape
    resid = y - y.mean(1, keepdims=True) - y.mean(0, keepdims=True) + y.mean()
    s = np.sqrt((resid**2).sum() / ((k - 1) * (n - 1)))
    w = st.studentized_range.ppf(0.95, k, (k - 1) * (n - 1)) * s / np.sqrt(n)
    means = y.mean(1)
    for key, row in zip(VALUES, sorted(doc["rows"], key=lambda r: list(VALUES).index(
            (r["levels"]["train.optimizer"], r["levels"]["train.l2"])))):  # fmt: skip
        i = list(VALUES).index(key)
        gap = means[i] - np.max(np.delete(means, i))
        assert row["verdict"]["advantage"] == pytest.approx(gap, abs=1e-12)
        assert row["possibly_best"] == bool(gap + w >= 0)
        assert row["verdict"]["low"] == pytest.approx(min(0.0, gap - w), abs=1e-9)
    assert doc["evidence"]["half_width"] == pytest.approx(w, rel=1e-6)


def test_golden_markdown_leaderboard(tmp_path):
    """The rendered markdown leaderboard and ablation, byte for byte (format drift check)."""
    grid, store = known_store(tmp_path)
    doc = leaderboard(grid, store)
    text = render(doc, "markdown") + render_ablation(doc.ablation, markdown=True)
    golden = DATA / "golden_board.md"
    assert text == golden.read_text()


def test_optimization_view_epochs_to_95_percent(tmp_path):
    grid, store = known_store(tmp_path)
    view = ablation(grid, store).to_json()["optimization"]
    # curves go v/2 then v: 95% of the best is first reached at epoch 2
    assert {r["epochs_to_95pct"] for r in view} == {2.0}
    assert {r["final_train_loss"] for r in view} == {0.5}
