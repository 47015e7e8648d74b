"""initializers: formulas of the papers, checked against torch.nn.init draw for draw."""

import math

import pytest
import torch

from runner.components.activations import gain
from runner.components.initializers import INITIALIZERS, initialize
from runner.recipe.loader import resolve
from runner.training.models import build_model, layers_with_weights


def gen(seed=0):
    return torch.Generator().manual_seed(seed)


def fresh(shape=(128, 64)):
    return torch.empty(*shape)


def test_glorot_uniform_bound_and_variance():
    """Glorot & Bengio 2010: bound sqrt(6/(fan_in+fan_out)) = 0.1767767 for 64 -> 128,
    variance 2/(fan_in+fan_out) = 0.0104167 (5% on 8192 draws)."""
    w = initialize("glorot_uniform", fresh(), 1.0, 0.0, gen())
    assert w.abs().max() <= 0.1767767 + 1e-7
    assert w.abs().max() > 0.17
    assert float(w.var()) == pytest.approx(0.0104167, rel=0.05)


@pytest.mark.parametrize(
    "ours, reference",
    [
        ("glorot_uniform", lambda w, g: torch.nn.init.xavier_uniform_(w, generator=g)),
        ("glorot_normal", lambda w, g: torch.nn.init.xavier_normal_(w, generator=g)),
        ("he_normal", lambda w, g: torch.nn.init.kaiming_normal_(w, nonlinearity="relu", generator=g)),
        ("he_uniform", lambda w, g: torch.nn.init.kaiming_uniform_(w, nonlinearity="relu", generator=g)),
        ("orthogonal", lambda w, g: torch.nn.init.orthogonal_(w, gain=math.sqrt(2), generator=g)),
    ],
)
def test_same_draws_as_torch_nn_init(ours, reference):
    """With the same generator state, each initializer equals torch.nn.init's (ReLU gain)."""
    w = initialize(ours, fresh(), gain("relu"), 0.0, gen(7))
    assert torch.equal(w, reference(fresh(), gen(7)))


def test_he_normal_std_and_he_uniform_bound():
    """He et al. 2015: std sqrt(2/fan_in) = 0.1767767 and bound sqrt(6/fan_in) = 0.306186 (fan_in 64)."""
    w = initialize("he_normal", fresh((512, 64)), gain("relu"), 0.0, gen())
    assert float(w.std()) == pytest.approx(0.1767767, rel=0.03)
    u = initialize("he_uniform", fresh((512, 64)), gain("relu"), 0.0, gen())
    assert float(u.abs().max()) == pytest.approx(0.306186, rel=0.01)
    assert float(u.abs().max()) <= 0.306186 + 1e-6


def test_lecun_normal_std():
    """LeCun et al. 1998: std 1/sqrt(fan_in) = 0.125 for fan_in 64."""
    w = initialize("lecun_normal", fresh((512, 64)), gain("relu"), 0.0, gen())
    assert float(w.std()) == pytest.approx(0.125, rel=0.03)


@pytest.mark.parametrize("shape", [(64, 128), (128, 64), (32, 32)])
def test_orthogonal_rows_or_columns_orthonormal(shape):
    """Saxe et al. 2014: W W^T = I for wide matrices, W^T W = I for tall ones (1e-5)."""
    w = initialize("orthogonal", fresh(shape), 1.0, 0.0, gen())
    small = w @ w.T if shape[0] <= shape[1] else w.T @ w
    assert torch.allclose(small, torch.eye(min(shape)), atol=1e-5)


def test_orthogonal_with_relu_gain_has_singular_values_sqrt2():
    w = initialize("orthogonal", fresh((64, 64)), gain("relu"), 0.0, gen())
    assert torch.allclose(torch.linalg.svdvals(w), torch.full((64,), math.sqrt(2)), atol=1e-5)


def test_gains_follow_torch_calculate_gain():
    """relu sqrt(2), tanh 5/3, sigmoid 1, leaky_relu sqrt(2/(1+a^2)) (torch.nn.init.calculate_gain)."""
    for name in ("relu", "tanh", "sigmoid"):
        assert gain(name) == pytest.approx(torch.nn.init.calculate_gain(name))
    assert gain("leaky_relu", 0.2) == pytest.approx(torch.nn.init.calculate_gain("leaky_relu", 0.2))


def test_normal_and_uniform_use_the_explicit_scale():
    assert float(initialize("normal", fresh((256, 256)), 1.0, 0.5, gen()).std()) == pytest.approx(0.5, rel=0.02)
    assert float(initialize("uniform", fresh((256, 256)), 1.0, 0.3, gen()).abs().max()) <= 0.3


def _model(init, activation="sigmoid", hidden=(8, 8)):
    s = resolve(
        {"data": {"source": "iris"}, "model": {"init": init, "activation": activation, "hidden": list(hidden)}}, {}
    )
    return build_model(s.model, (4,), 3, gen(1), gen(2))


def test_model_applies_initializer_and_zero_biases():
    net = _model("glorot_uniform", "relu", (64,))
    first, last = layers_with_weights(net)
    assert first.weight.abs().max() <= math.sqrt(6 / (4 + 64)) + 1e-7
    assert all(float(l.bias.detach().abs().max()) == 0 for l in (first, last))


def test_zeros_init_never_breaks_symmetry():
    """With all-zero weights every hidden unit of a layer gets the same gradient and stays
    identical through training (a fact of the trade)."""
    torch.manual_seed(0)
    net = _model("zeros")
    x, y = torch.randn(32, 4), torch.randint(0, 3, (32,))
    opt = torch.optim.SGD(net.parameters(), lr=0.5)
    for _ in range(20):
        opt.zero_grad()
        torch.nn.functional.cross_entropy(net(x), y).backward()
        for layer in layers_with_weights(net)[:-1]:
            assert torch.allclose(layer.weight.grad, layer.weight.grad[:1].expand_as(layer.weight.grad))
        opt.step()
    hidden = layers_with_weights(net)[1].weight
    assert torch.allclose(hidden, hidden[:1].expand_as(hidden))
    assert float(layers_with_weights(net)[-1].weight.detach().abs().max()) > 0  # the net did train


def test_every_initializer_is_registered_and_runs():
    for name in INITIALIZERS:
        w = initialize(name, fresh((16, 8)), 1.0, 0.1, gen())
        assert torch.isfinite(w).all()
