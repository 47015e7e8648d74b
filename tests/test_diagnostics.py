"""diagnostics: the initialization and end-of-training numbers, equal on both backends, equal
to torch autograd, and without effect on training."""

import math

import pytest
import torch
import torch.nn.functional as F
from conftest import write_recipe

from runner.components.activations import ACTIVATIONS, make_activation
from runner.execution.executors import prepare_process
from runner.recipe.grid import expand
from runner.recipe.loader import load_recipe
from runner.training import summaries
from runner.training.grouping import stack_key
from runner.training.loop import train_group, train_job
from runner.training.single import SingleBackend
from runner.training.stacked import StackedBackend

ACTS = """
name = "acts"
seeds = [1, 2]
[data]
source = "{source}"
[model]
hidden = [16, 16, 16]
init = "glorot_uniform"
[train]
epochs = {epochs}
batch_size = 32
lr = 0.01
[factors]
"model.activation" = ["relu", "tanh", "sigmoid", "leaky_relu", "elu", "gelu"]
"""

INIT_KEYS = ("init_input_std", "act_spread", "backprop_spread", "grad_weight_max", "grad_ratio")
INIT_LISTS = ("init_backprop_norms", "init_weight_norms", "init_grad_norms", "init_act_std")


def _specs(tmp_path, source="wine", epochs=6):
    grid = expand(load_recipe(write_recipe(tmp_path, ACTS.format(source=source, epochs=epochs))))
    prepare_process(1, grid.datasets)
    return [job.spec() for job in grid], grid.datasets[grid[0].config.data_id]


def _groups(specs):
    """The specs in stackable groups (one per activation), as the planner forms them."""
    groups: dict = {}
    for s in specs:
        groups.setdefault(stack_key(s), []).append(s)
    assert None not in groups and len(groups) == len(ACTIVATIONS)
    return list(groups.values())


def test_gradient_at_each_hidden_activation_equals_autograd(tmp_path):
    """The back-propagated norms on both paths equal torch.autograd.grad of the probe loss
    with respect to each activation's output, taken layer by layer on the single-job net."""
    specs, ds = _specs(tmp_path)
    acts = tuple({type(make_activation(a)) for a in ACTIVATIONS})
    stacked = [d for group in _groups(specs) for d in StackedBackend(group, ds).initial_diagnostics()]
    specs = [s for group in _groups(specs) for s in group]
    for spec, from_stack in zip(specs, stacked):
        single = SingleBackend(spec, ds)
        x, y = single.Xtr[single.probe], single.ytr[single.probe]
        h, outputs = x, []
        single.net.eval()
        for module in single.net:
            h = module(h)
            if isinstance(module, acts):
                outputs.append(h)
        grads = torch.autograd.grad(F.cross_entropy(h, y), outputs)
        reference = [float(g.norm()) for g in grads]
        recorded = SingleBackend(spec, ds).initial_diagnostics()[0]
        assert recorded["init_backprop_norms"] == pytest.approx(reference, rel=1e-6)
        assert from_stack["init_backprop_norms"] == pytest.approx(reference, rel=1e-5)
        weights = [float(m.weight.detach().norm()) for m in single.net if isinstance(m, torch.nn.Linear)]
        assert from_stack["init_weight_norms"] == pytest.approx(weights, rel=1e-6)


@pytest.mark.parametrize("source", ["wine", "diabetes"])
def test_both_paths_record_the_same_diagnostics(tmp_path, source):
    """Every diagnostic the flags read, on the stacked and the single-job path: the
    initialization numbers to float32 summation order, the scales exactly, and each
    end-of-training summary as summaries.py computes it from that path's own curves."""
    specs, ds = _specs(tmp_path, source)
    pairs = [(s, r) for group in _groups(specs) for s, r in zip(group, train_group(group, ds))]
    for spec, stacked in pairs:
        single = train_job(spec, ds)
        a, b = stacked.diagnostics, single.diagnostics
        assert a["stacked"] == 2 and "stacked" not in b  # each group: its two seeds
        for key in INIT_KEYS:
            assert a[key] == pytest.approx(b[key], rel=1e-5), key
        for key in INIT_LISTS:
            assert a[key] == pytest.approx(b[key], rel=1e-5), key
        for key in ("val_rows", "classes", "target_std"):
            assert a.get(key) == b.get(key), key
        for result in (stacked, single):
            d, monitor = result.diagnostics, spec.monitor
            higher = monitor in ("accuracy", "f1_macro", "r2")
            assert {k: d[k] for k in summaries.tail_trend([0.0], True, 1)} == summaries.tail_trend(
                result.curves[f"val_{monitor}"], higher, spec.settings.train.epochs
            )
            assert d["loss_rise"] == summaries.loss_rise(result.curves["train_loss"])
            assert d["gap_scaled"] == summaries.scaled_gap(d["gap"], monitor, d.get("target_std"), d.get("classes"))
        assert a["loss_rise"] == pytest.approx(b["loss_rise"], rel=1e-3, abs=1e-6)
        assert a["gap_scaled"] == pytest.approx(b["gap_scaled"], abs=2 / a["val_rows"] + 1e-3)
        if source == "wine":
            assert a["log_loss_ratio"] == pytest.approx(b["log_loss_ratio"], rel=1e-3)
            assert b["log_loss_ratio"] == pytest.approx(
                single.metrics["val"]["log_loss"] / b["log_loss_bound"], rel=1e-12
            )


def test_diagnostics_change_no_training_number(tmp_path, monkeypatch):
    """The initialization probe runs in eval mode and draws no random number: with it
    skipped, every curve and final metric is bitwise the same, on both paths."""
    specs, ds = _specs(tmp_path, epochs=3)
    specs = _groups(specs)[0]
    with_probe = [train_job(s, ds) for s in specs] + train_group(specs, ds)
    for backend in (SingleBackend, StackedBackend):
        monkeypatch.setattr(backend, "initial_diagnostics", lambda self: [{} for _ in range(self.members)])
    without = [train_job(s, ds) for s in specs] + train_group(specs, ds)
    for a, b in zip(with_probe, without):
        assert a.curves == b.curves and a.metrics == b.metrics
        assert "act_spread" in a.diagnostics and "act_spread" not in b.diagnostics


def test_scales_recorded_for_the_flags(tmp_path):
    """A classification job records its val rows and classes; a regression job its target's
    std on the training split (the divisor of its standardization: numpy's std, ddof 0)."""
    from runner.datasets.splits import split_and_scale

    specs, ds = _specs(tmp_path, "diabetes", epochs=1)
    result = train_job(specs[0], ds)
    sp = split_and_scale(ds, specs[0].settings.data, specs[0].seed)
    assert result.diagnostics["target_std"] == pytest.approx(float(sp.y_train.std()), rel=1e-12)
    assert result.diagnostics["val_rows"] == len(sp.y_val) and "classes" not in result.diagnostics
    assert math.isfinite(result.diagnostics["gap_scaled"])
