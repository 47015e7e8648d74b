"""flags: each flag fires on small networks where theory says it must and stays quiet where it
must not (through the CLI), the rules behind them, and the legend under the board."""

import json

import pytest
from conftest import invoke, write_recipe

from runner.evidence.document import Counts
from runner.evidence.flags import LEGEND, flags
from runner.recipe.loader import DiagnosticThresholds


def _board(tmp_path, text, *extra):
    path = write_recipe(tmp_path, text)
    result = invoke("run", path, "--store", tmp_path / "s.sqlite", "-q", "--workers", 1, "--format", "json", *extra)
    assert result.exit_code == 0, result.output
    return path, json.loads(result.stdout)


def _codes(doc, factor):
    return {r["labels"][factor]: {f["code"] for f in r["flags"]} for r in doc["rows"]}


DEEP = """
name = "deep"
seeds = [1, 2]
[data]
source = "digits"
[model]
hidden = [32, 32, 32, 32, 32, 32, 32, 32, 32, 32]
[train]
epochs = 1
[factors.net]
labels = ["tanh_small", "relu_small", "tanh_glorot", "relu_he", "relu_big", "relu_big_sgd"]
"model.activation" = ["tanh", "relu", "tanh", "relu", "relu", "relu"]
"model.init" = ["normal", "normal", "glorot_uniform", "he_normal", "normal", "normal"]
"model.init_scale" = [0.01, 0.01, 0.01, 0.01, 1.0, 1.0]
"train.optimizer" = ["adam", "adam", "adam", "adam", "adam", "sgd"]
"train.lr" = [1e-3, 1e-3, 1e-3, 1e-3, 1e-3, 0.1]
"""


@pytest.mark.filterwarnings("ignore:invalid value encountered:RuntimeWarning")  # the diverging SGD row
def test_vanishing_and_exploding_see_uniform_collapse_and_growth(tmp_path):
    """10 layers of 32 on digits. With normal(0, 0.01) weights each layer multiplies the
    activations' std by about 0.01 * sqrt(32) = 0.057 going forward (tanh'(0) = 1, and ReLU
    halves the variance on top), and the back-propagated gradient by the same factor through
    W^T going back: both collapse by ~1e-11 over ten layers, so every weight gradient (their
    product) is tiny alike and the first-to-last weight-gradient ratio stays near 1, the
    blindness Glorot & Bengio (2010) describe. Glorot (tanh) and He (ReLU; He et al. 2015)
    keep the variance across depth: no flag. normal(0, 1) with ReLU multiplies it by
    sqrt(32 / 2) = 4 per layer: exploding, also for jobs that then diverged (their
    initialization was measured before they did)."""
    _, doc = _board(tmp_path, DEEP)
    codes = _codes(doc, "net")
    for net in ("tanh_small", "relu_small"):
        assert "vanishing_gradients" in codes[net] and "exploding_gradients" not in codes[net]
    for net in ("tanh_glorot", "relu_he"):
        assert not codes[net] & {"vanishing_gradients", "exploding_gradients"}, codes[net]
    assert "exploding_gradients" in codes["relu_big"]
    assert {"diverged", "exploding_gradients"} <= codes["relu_big_sgd"]
    rows = {r["labels"]["net"]: r for r in doc["rows"]}
    assert rows["relu_big_sgd"]["counts"]["diverged"] == 2
    for net in ("tanh_small", "relu_small", "relu_big"):  # what the old rule alone saw: nothing
        assert 1e-3 < rows[net]["diagnostics"]["grad_ratio"] < 1e3
    assert rows["tanh_small"]["diagnostics"]["backprop_spread"] < 1e-9
    assert rows["relu_big"]["diagnostics"]["act_spread"] > 1e5


OPTIMIZERS = """
name = "opt"
seeds = [1, 2, 3]
[data]
source = "digits"
[model]
hidden = [64]
init = "he_normal"
[train]
epochs = 30
batch_size = 32
[factors.opt]
"train.optimizer" = ["sgd", "adam", "adam"]
"train.lr" = [1e-3, 1e-3, 0.05]
"""


def test_still_improving_unstable_and_miscalibrated_on_digits(tmp_path):
    """Plain SGD at lr 1e-3 climbs all through its 30 epochs (it reaches 0.19-0.41 test
    accuracy by then where Adam reaches 0.97: ../shared/REFERENCE_CHECKS.md): still
    improving; Adam at 1e-3 has levelled off: no flag. Adam moves every weight by about lr
    each step whatever the gradient's size (Kingma & Ba 2015), so at lr 0.05 the training
    loss keeps jumping back up (unstable) and the logits grow until its mistakes are made
    with near-certainty (miscalibrated: log-loss above Fano's bound for its accuracy)."""
    path, doc = _board(tmp_path, OPTIMIZERS)
    codes = _codes(doc, "opt")
    assert "still_improving" in codes["sgd/0.001"]
    assert codes["adam/0.001"] == set()
    assert {"unstable_loss", "miscalibrated"} <= codes["adam/0.05"]
    assert "still_improving" not in codes["adam/0.05"]
    # the legend: one line per flag on the board, in every format
    present = {c for cs in codes.values() for c in cs}
    assert set(doc["flag_legend"]) == present
    assert all(set(entry) == {"meaning", "try"} for entry in doc["flag_legend"].values())
    table = invoke("board", path, "--store", tmp_path / "s.sqlite").stdout
    legend = table.split("\nFlags:\n", 1)[1].splitlines()
    assert len(legend) == len(present) and any(line.startswith("  still improving: ") for line in legend)
    markdown = invoke("board", path, "--store", tmp_path / "s.sqlite", "--format", "markdown").stdout
    assert "**Flags**" in markdown and "(`still_improving`)" in markdown
    # thresholds act on stored numbers: a stricter rule, no rerun
    stricter = path.read_text() + "[diagnostics]\nimproving_share = 0.9\nunstable_above = 100\n"
    path.write_text(stricter)
    again = json.loads(invoke("board", path, "--store", tmp_path / "s.sqlite", "--format", "json").stdout)
    codes = _codes(again, "opt")
    assert "still_improving" not in codes["sgd/0.001"] and "unstable_loss" not in codes["adam/0.05"]


DIABETES = """
name = "diabetes"
seeds = [1, 2, 3, 4, 5]
[data]
source = "diabetes"
[model]
hidden = [64, 64]
[train]
lr = 1e-3
epochs = 100
[factors.cfg]
labels = ["linear", "stopped_late", "stopped_fast", "no_stop"]
"model.hidden" = [[], [64, 64], [64, 64], [64, 64]]
"train.lr" = [1e-2, 1e-4, 3e-2, 1e-3]
"train.epochs" = [100, 60, 100, 100]
"train.patience" = [0, 10, 5, 0]
"""


def test_overfitting_and_stopped_early_on_diabetes(tmp_path):
    """Regression gaps in units of the target's std. A linear model (11 parameters on about
    265 training rows) can barely overfit: the training error's optimism is about 2p/n of
    the error variance (Mallows' Cp, from memory), a gap near 0.03 sd: no flag. Two layers
    of 64 trained 100 epochs without stopping fit the training rows far better than the
    val rows: overfitting. Adam at lr 0.03 finds its best val epoch within the first tenth
    of the budget (early stopping then keeps a barely trained network): stopped early; at
    lr 1e-4 with patience 10 it stops late in its budget: no flag. (At lr 1e-3 three of five
    seeds keep an epoch at most 6 of 60, so the flag is right to fire there.)"""
    _, doc = _board(tmp_path, DIABETES)
    codes = _codes(doc, "cfg")
    assert "overfitting" not in codes["linear"]
    assert "overfitting" in codes["no_stop"]
    assert "stopped_early" in codes["stopped_fast"]
    assert "stopped_early" not in codes["stopped_late"]
    for cfg in ("linear", "no_stop"):  # early stopping off: nothing to say
        assert "stopped_early" not in codes[cfg]


MOONS = """
name = "moons"
seeds = [1, 2, 3]
[data]
source = "moons"
n_samples = 300
noise = 0.45
split = { val = 0.3, test = 0.3 }
[model]
hidden = [128, 128]
init = "he_normal"
[train]
epochs = 300
batch_size = 16
lr = 1e-2
[factors]
"train.l2" = [0.0, 3e-3]
"""


def test_overfitting_and_miscalibration_on_a_small_noisy_split(tmp_path):
    """Two moons with noise 0.45 overlap, so no classifier is near 100% on new rows, yet a
    128x128 network fits 120 training rows almost perfectly: a train-val accuracy gap well
    over 0.1. On separable training rows cross-entropy keeps growing the logits (from
    memory: Soudry et al. 2018), so its val mistakes are made with near-certainty: log-loss
    above Fano's bound. An L2 penalty keeps the weights, and the logits, bounded: neither."""
    _, doc = _board(tmp_path, MOONS)
    codes = _codes(doc, "train.l2")
    assert {"overfitting", "miscalibrated"} <= codes["0"]
    assert not codes["0.003"] & {"overfitting", "miscalibrated"}


TH = DiagnosticThresholds()


def test_initialization_flags_read_every_finished_job_end_flags_only_done_ones():
    """Diverged jobs' initialization diagnostics count; their end-of-training numbers would
    not exist, and a done job's decide the end flags alone."""
    exploding = {"act_spread": 1e6, "grad_ratio": 1.0}
    done = {"act_spread": 1.0, "grad_ratio": 1.0, "loss_rise": 0.0}
    counts = Counts(done=1, diverged=2)
    with_all = flags([done], counts, TH, init_diags=[done, exploding, exploding])
    assert [f.code for f in with_all] == ["diverged", "exploding_gradients"]
    assert [f.code for f in flags([done], counts, TH)] == ["diverged"]


def test_judged_flags_fire_on_at_least_half_the_jobs_and_say_how_many():
    improving = {"tail_trend_p": 0.001, "tail_gain_share": 0.3, "tail_has_best": True}
    flat = {"tail_trend_p": 0.4, "tail_gain_share": 0.0, "tail_has_best": False}
    cut_short = {"tail_trend_p": None, "tail_gain_share": None, "tail_has_best": None}
    out = flags([improving, flat, cut_short, improving], Counts(done=4), TH)
    assert [(f.code, f.text) for f in out] == [("still_improving", "still improving 2/3")]
    assert flags([improving, flat, flat], Counts(done=3), TH) == []


@pytest.mark.parametrize(
    "diag,code",
    [
        ({"grad_weight_max": 1e-9}, "vanishing_gradients"),
        ({"grad_weight_max": 1e4}, "exploding_gradients"),
        ({"backprop_spread": 1e-5}, "vanishing_gradients"),
        ({"act_spread": 0.0}, "vanishing_gradients"),
        ({"best_epoch_share": 0.04}, "stopped_early"),
        ({"loss_rise": 0.5}, "unstable_loss"),
        ({"log_loss_ratio": 1.5}, "miscalibrated"),
        ({"gap_scaled": 0.2}, "overfitting"),
    ],
)
def test_each_rule_reads_its_stored_number(diag, code):
    assert [f.code for f in flags([diag], Counts(done=1), TH)] == [code]


def test_every_flag_has_a_legend_line():
    codes = {f.code for f in flags([], Counts(done=1, diverged=1, failed=1, timeout=1), TH)}
    assert codes <= set(LEGEND)
    assert all(len(meaning) < 200 and len(what) < 120 for meaning, what in LEGEND.values())
