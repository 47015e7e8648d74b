"""regularizers and dropout: soft-threshold, proximal L1 (ISTA), sparsity, inverted dropout."""

import numpy as np
import pytest
import torch
from conftest import write_recipe
from sklearn.datasets import load_diabetes, make_circles
from sklearn.linear_model import Lasso, LogisticRegression
from sklearn.preprocessing import StandardScaler

from runner.components.regularizers import soft_threshold_, sparsity
from runner.execution.executors import prepare_process
from runner.recipe.grid import expand
from runner.recipe.loader import load_recipe
from runner.training.loop import train_job
from runner.training.models import Dropout, weight_tensors


def test_soft_threshold_worked_example_and_softshrink():
    """z = (-1.5, -0.3, 0, 0.2, 0.7), threshold 0.5 -> (-1, 0, 0, 0, 0.2) = F.softshrink."""
    z = torch.tensor([-1.5, -0.3, 0.0, 0.2, 0.7], dtype=torch.float64)
    ref = torch.nn.functional.softshrink(z.clone(), 0.5)
    out = soft_threshold_(z, 0.5)
    assert torch.equal(out, ref)
    assert out.tolist() == pytest.approx([-1.0, 0.0, 0.0, 0.0, 0.2])


def test_proximal_gradient_matches_sklearn_lasso_on_diabetes():
    """ISTA (Beck & Teboulle 2009) with our soft-threshold on the bundled diabetes data,
    standardized, y centred, alpha 5: equals sklearn.linear_model.Lasso, with exact zeros
    on features 0, 4, 5, 7, 9."""
    X, y = load_diabetes(return_X_y=True)
    X = StandardScaler().fit_transform(X)
    y = y - y.mean()
    n, alpha = len(y), 5.0
    Xt, yt = torch.from_numpy(X), torch.from_numpy(y)
    step = 1.0 / float(torch.linalg.eigvalsh(Xt.T @ Xt / n).max())
    w = torch.zeros(X.shape[1], dtype=torch.float64)
    for _ in range(20000):
        grad = -Xt.T @ (yt - Xt @ w) / n
        w = soft_threshold_(w - step * grad, step * alpha)
    ref = Lasso(alpha=alpha, fit_intercept=False, tol=1e-14, max_iter=1_000_000).fit(X, y).coef_
    assert np.allclose(w.numpy(), ref, atol=1e-6)
    assert np.flatnonzero(w.numpy() == 0).tolist() == [0, 4, 5, 7, 9]


def _circles_csv(tmp_path):
    X, y = make_circles(n_samples=600, noise=0.05, factor=0.5, random_state=0)
    lines = ["x1,x2,x1_sq,x2_sq,ring"] + [f"{a},{b},{a * a},{b * b},{c}" for (a, b), c in zip(X, y)]
    (tmp_path / "circles.csv").write_text("\n".join(lines) + "\n")
    return X, y


def _linear_l1(tmp_path, mode):
    _circles_csv(tmp_path)
    path = write_recipe(
        tmp_path,
        f"""
        name = "l1"
        seeds = [0]
        [data]
        source = "circles.csv"
        target = "ring"
        [model]
        hidden = []
        [train]
        optimizer = "sgd"
        lr = 0.5
        batch_size = "full"
        epochs = 400
        l1 = 0.05
        l1_mode = "{mode}"
    """,
    )
    grid = expand(load_recipe(path))
    prepare_process(1, grid.datasets)
    job = grid[0]
    net, result = train_job(job.spec(), grid.datasets[job.config.data_id], keep_model=True)
    assert result.status == "done", result.error
    return weight_tensors(net)[0].detach(), result


def test_proximal_l1_zeroes_linear_terms_on_circles(tmp_path):
    """On make_circles with features x1, x2, x1^2, x2^2 the classes differ only in radius:
    an L1 linear classifier sets the x1 and x2 weights to exactly zero and keeps the squared
    ones (fact of the trade). sklearn's L1 LogisticRegression agrees."""
    w, result = _linear_l1(tmp_path, "proximal")
    assert torch.all(w[:, :2] == 0)
    assert torch.all(w[:, 2:].abs() > 0.1)
    assert result.diagnostics["zero_fraction"] == pytest.approx(0.5)
    assert result.metrics["val"]["accuracy"] > 0.95
    X, y = make_circles(n_samples=600, noise=0.05, factor=0.5, random_state=0)
    feats = StandardScaler().fit_transform(np.column_stack([X, X**2]))
    ref = LogisticRegression(l1_ratio=1.0, solver="liblinear", C=0.05).fit(feats, y).coef_[0]  # pure L1
    assert np.all(ref[:2] == 0) and np.all(np.abs(ref[2:]) > 0)


def test_subgradient_l1_gets_near_zero_but_not_exact(tmp_path):
    """The same penalty through autograd leaves no exact zeros."""
    w, result = _linear_l1(tmp_path, "penalty")
    assert result.diagnostics["zero_fraction"] == 0.0
    assert float(w[:, :2].abs().max()) < float(w[:, 2:].abs().min())


def test_sparsity_counts():
    out = sparsity([torch.tensor([0.0, 0.0, 1e-4, 0.5])], tol=1e-3)
    assert out == {"zero_fraction": 0.5, "near_zero_fraction": 0.75}


@pytest.mark.parametrize("p", [0.2, 0.5])
def test_inverted_dropout_keeps_the_mean_and_is_identity_in_eval(p):
    """Srivastava et al. 2014 inverted dropout: kept units scaled by 1/(1-p) (1.25 for 0.2,
    2.0 for 0.5); the output mean equals the input mean within 5 standard errors
    sqrt(p/(1-p)/n); eval mode is the identity."""
    layer = Dropout(p, torch.Generator().manual_seed(0))
    x = torch.ones(200_000)
    out = layer(x)
    kept = out[out != 0]
    assert torch.allclose(kept, torch.full_like(kept, 1 / (1 - p)))
    se = (p / (1 - p) / len(x)) ** 0.5
    assert abs(float(out.mean()) - 1.0) < 5 * se
    layer.eval()
    assert torch.equal(layer(x), x)
