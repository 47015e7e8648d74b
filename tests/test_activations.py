"""activations: derivative facts of the trade, computed by autograd."""

import torch

from runner.components.activations import ACTIVATIONS, make_activation


def derivative(name, x):
    x = torch.tensor(x, requires_grad=True)
    make_activation(name)(x).sum().backward()
    return x.grad


def test_sigmoid_derivative_peaks_at_quarter_at_zero():
    """The logistic sigmoid's derivative s(1-s) is at most 0.25, reached at 0."""
    grid = torch.linspace(-6, 6, 1201)
    d = derivative("sigmoid", grid.tolist())
    assert abs(float(d.max()) - 0.25) < 1e-7
    assert abs(float(grid[d.argmax()])) < 1e-6


def test_relu_derivative_one_for_positive_zero_for_negative():
    d = derivative("relu", [-2.0, -0.1, 0.1, 3.0])
    assert d.tolist() == [0.0, 0.0, 1.0, 1.0]


def test_tanh_derivative_one_at_zero():
    assert float(derivative("tanh", [0.0])[0]) == 1.0


def test_all_activations_are_registered():
    assert sorted(ACTIVATIONS) == ["elu", "gelu", "leaky_relu", "relu", "sigmoid", "tanh"]
