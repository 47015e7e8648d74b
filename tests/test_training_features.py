"""train: early stopping, full batch, clipping, CNN on images, NPZ input, batch norm,
and the diagnostics flags on a deep network."""

import json

import numpy as np
import pytest
import torch
from conftest import invoke, write_recipe
from sklearn.datasets import load_digits

from runner.execution.executors import prepare_process
from runner.recipe.grid import expand
from runner.recipe.loader import load_recipe
from runner.training.loop import train_job


def fit(tmp_path, body, index=0):
    grid = expand(load_recipe(write_recipe(tmp_path, 'name = "f"\nseeds = [3]\n' + body)))
    prepare_process(1, grid.datasets)
    job = grid[index]
    return train_job(job.spec(), grid.datasets[job.config.data_id], keep_model=True)


WINE = """
[data]
source = "wine"
[model]
hidden = [64, 64]
[train]
lr = 0.01
batch_size = 8
"""


def test_early_stopping_restores_the_best_epoch(tmp_path):
    net, r = fit(tmp_path, WINE + "epochs = 200\npatience = 5\n")
    assert r.status == "done"
    assert r.epochs_run < 200
    curve = r.curves["val_accuracy"]
    assert r.best_epoch == 1 + int(np.argmax(curve))  # the first epoch with the best value
    assert r.epochs_run == r.best_epoch + 5
    assert r.metrics["val"]["accuracy"] == curve[r.best_epoch - 1]  # restored weights


def test_full_batch_equals_batch_of_all_rows(tmp_path):
    _, a = fit(tmp_path, WINE.replace("batch_size = 8", 'batch_size = "full"') + "epochs = 5\n")
    _, b = fit(tmp_path, WINE.replace("batch_size = 8", "batch_size = 100000") + "epochs = 5\n")
    assert a.curves == b.curves and len(a.curves["lr"]) == 5


def test_clipping_changes_the_trajectory(tmp_path):
    _, a = fit(tmp_path, WINE + "epochs = 3\n")
    _, b = fit(tmp_path, WINE + "epochs = 3\nclip_norm = 0.01\n")
    assert a.curves["train_loss"] != b.curves["train_loss"]


def test_cnn_on_digits_images(tmp_path):
    net, r = fit(
        tmp_path,
        """
[data]
source = "digits"
[model]
kind = "cnn"
channels = [8, 16]
hidden = [32]
batch_norm = true
[train]
epochs = 8
batch_size = 32
lr = 3e-3
""",
    )
    assert r.status == "done", r.error
    assert any(isinstance(m, torch.nn.Conv2d) for m in net.modules())
    assert any(isinstance(m, torch.nn.BatchNorm2d) for m in net.modules())
    assert r.metrics["val"]["accuracy"] > 0.9


def test_cnn_on_npz_images(tmp_path):
    """A user NPZ with X of shape (N, H, W) and y: made here from the bundled digits."""
    d = load_digits()
    np.savez(tmp_path / "digits.npz", X=d.images[:600], y=d.target[:600])
    _, r = fit(
        tmp_path,
        """
[data]
source = "digits.npz"
[model]
kind = "cnn"
channels = [8]
hidden = []
[train]
epochs = 5
lr = 3e-3
""",
    )
    assert r.status == "done", r.error
    assert r.metrics["val"]["accuracy"] > 0.8


def test_cnn_on_tabular_data_is_refused(tmp_path):
    result = invoke("run", write_recipe(tmp_path, 'name = "c"\n[data]\nsource = "iris"\n[model]\nkind = "cnn"\n'))
    assert result.exit_code == 2 and "needs image data" in result.stderr


def test_regression_on_diabetes(tmp_path):
    _, r = fit(
        tmp_path,
        """
[data]
source = "diabetes"
[model]
hidden = [32]
[train]
epochs = 60
lr = 3e-3
""",
    )
    assert r.status == "done"
    # Predicting the training mean gives r2 near 0; a fitted model does much better.
    assert r.metrics["val"]["r2"] > 0.3 and r.metrics["val"]["rmse"] < 70


SHRUNK_DEPTH = """
name = "depth-small"
seeds = [1]
[data]
source = "digits"
[model]
hidden = [32, 32, 32, 32, 32, 32, 32, 32]
[train]
epochs = 1
[factors]
"model.init" = ["zeros", "glorot_uniform", "orthogonal"]
"model.activation" = ["sigmoid", "relu"]
"""


def test_vanishing_gradient_flag_on_deep_sigmoid_not_on_relu(tmp_path):
    """A shrunken recipes/depth_and_init.toml: 8 sigmoid layers shrink the gradient by the
    sigmoid's derivative (at most 0.25) per layer, so the first layer's gradient norm falls
    below 1e-3 of the last's; Glorot or orthogonal init with ReLU keeps it near 1."""
    path = write_recipe(tmp_path, SHRUNK_DEPTH)
    doc = json.loads(
        invoke("run", path, "--store", tmp_path / "s.sqlite", "-q", "--format", "json", "--workers", 2).stdout
    )
    flags = {
        (r["levels"]["model.init"], r["levels"]["model.activation"]): [f["text"] for f in r["flags"]]
        for r in doc["rows"]
    }
    for init in ("zeros", "glorot_uniform", "orthogonal"):
        assert "vanishing gradients" in flags[(init, "sigmoid")]
    assert "vanishing gradients" in flags[("zeros", "relu")]
    assert "dead units" in flags[("zeros", "relu")]
    for init in ("glorot_uniform", "orthogonal"):
        assert "vanishing gradients" not in flags[(init, "relu")]
        assert "exploding gradients" not in flags[(init, "relu")]


def test_diagnostics_recorded_per_layer(tmp_path):
    _, r = fit(tmp_path, WINE + "epochs = 1\n")
    d = r.diagnostics
    assert len(d["init_grad_norms"]) == 3 and len(d["init_act_mean"]) == 2
    assert d["grad_ratio"] == pytest.approx(d["init_grad_norms"][0] / d["init_grad_norms"][-1])
    assert 0.0 <= d["dead_fraction"] <= 1.0 and d["saturated_fraction"] is None


def test_init_stats_mean_and_std_equal_numpy_float64():
    """Activation mean and sample std (ddof=1) per member, as numpy computes them in float64,
    for float32 activations with a large offset (where a one-pass float32 formula loses digits)."""
    from runner.training.diagnostics import init_stats

    gen = torch.Generator().manual_seed(0)
    outputs = [torch.randn(3, 40000, generator=gen) * 0.01 + 100.0, torch.rand(3, 777, generator=gen)]
    stats = init_stats(outputs, [[1.0, 2.0]] * 3)
    for k in range(3):
        for i, o in enumerate(outputs):
            ref = o[k].numpy().astype(np.float64)
            assert stats[k]["init_act_mean"][i] == pytest.approx(ref.mean(), rel=1e-12)
            assert stats[k]["init_act_std"][i] == pytest.approx(ref.std(ddof=1), rel=1e-6)
