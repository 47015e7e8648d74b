"""optimizers: trajectories against published update rules, reference values and torch.optim."""

import math

import pytest
import torch

from runner.components.optimizers import OPTIMIZERS, build_optimizer
from runner.errors import RecipeError
from runner.recipe.grid import _check_rules
from runner.recipe.loader import resolve

H = torch.tensor([1.0, 10.0], dtype=torch.float64)  # f(w) = 1/2 w^T diag(1, 10) w


def train_settings(**kw):
    return resolve({"data": {"source": "iris"}, "train": kw}, {}).train


def quadratic_model(w0=(1.0, 1.0)):
    layer = torch.nn.Linear(2, 1, bias=False).double()
    with torch.no_grad():
        layer.weight.copy_(torch.tensor([w0], dtype=torch.float64))
    return layer


def run(opt_name, steps=3, grad=lambda w: H * w, w0=(1.0, 1.0), **kw):
    model = quadratic_model(w0)
    opt = build_optimizer(model, train_settings(optimizer=opt_name, **kw))
    out = []
    for _ in range(steps):
        opt.zero_grad()
        model.weight.grad = grad(model.weight.detach()[0]).reshape(1, 2).clone()
        opt.step()
        out.append(model.weight.detach()[0].clone())
    return out


def test_sgd_reference_values():
    """SGD lr 0.05: (0.95, 0.5), (0.9025, 0.25), (0.857375, 0.125)."""
    got = run("sgd", lr=0.05)
    ref = [(0.95, 0.5), (0.9025, 0.25), (0.857375, 0.125)]
    for w, r in zip(got, ref):
        assert w.tolist() == pytest.approx(r, abs=1e-12)


def test_momentum_equals_textbook_heavy_ball():
    """Polyak 1964 / Sutskever et al. 2013 form v <- mu v - lr g, w <- w + v gives the same
    trajectory as torch's b <- mu b + g, w <- w - lr b for a constant lr; reference values
    (0.95, 0.5), (0.8575, -0.2), (0.731375, -0.73)."""
    mu, lr = 0.9, 0.05
    w, v, textbook = torch.ones(2, dtype=torch.float64), torch.zeros(2, dtype=torch.float64), []
    for _ in range(6):
        v = mu * v - lr * H * w
        w = w + v
        textbook.append(w.clone())
    got = run("momentum", steps=6, lr=lr, momentum=mu)
    for a, b in zip(got, textbook):
        assert torch.allclose(a, b, atol=1e-12)
    for w, r in zip(got, [(0.95, 0.5), (0.8575, -0.2), (0.731375, -0.73)]):
        assert w.tolist() == pytest.approx(r, abs=1e-12)


def test_nesterov_equals_sutskever_look_ahead_point():
    """Sutskever et al. 2013: v <- mu v - lr grad(w + mu v), w <- w + v. torch's parameter is
    the look-ahead point w + mu v; reference values (0.905, 0.05), (0.778525, -0.4025),
    (0.631462625, -0.404875)."""
    mu, lr = 0.9, 0.05
    w, v, look = torch.ones(2, dtype=torch.float64), torch.zeros(2, dtype=torch.float64), []
    # torch starts from the look-ahead point phi_0 = w_0 (v_0 = 0); iterate in phi coordinates.
    for _ in range(6):
        v = mu * v - lr * H * (w + mu * v)
        w = w + v
        look.append(w + mu * v)
    got = run("nesterov", steps=6, lr=lr, momentum=mu)
    for a, b in zip(got, look):
        assert torch.allclose(a, b, atol=1e-12)
    ref = [(0.905, 0.05), (0.778525, -0.4025), (0.631462625, -0.404875)]
    for w, r in zip(got, ref):
        assert w.tolist() == pytest.approx(r, abs=1e-12)


def test_adam_algorithm_1():
    """Kingma & Ba 2015, Algorithm 1, on f = w^2 from w0 = 1, lr 0.1: w1 0.9000000005,
    w2 0.8004122287, w3 0.7015862729 (defaults b1 0.9, b2 0.999, eps 1e-8)."""
    grad = lambda w: 2 * w
    got = [float(w[0]) for w in run("adam", steps=3, grad=grad, w0=(1.0, 0.0), lr=0.1)]
    assert got == pytest.approx([0.9000000005, 0.8004122287, 0.7015862729], abs=1e-9)
    # The same numbers from the algorithm written out.
    b1, b2, eps, lr, w, m, v = 0.9, 0.999, 1e-8, 0.1, 1.0, 0.0, 0.0
    for t in range(1, 4):
        g = 2 * w
        m, v = b1 * m + (1 - b1) * g, b2 * v + (1 - b2) * g * g
        w -= lr * (m / (1 - b1**t)) / (math.sqrt(v / (1 - b2**t)) + eps)
        assert got[t - 1] == pytest.approx(w, abs=1e-12)


def test_adam_first_step_moves_by_lr_whatever_the_gradient():
    (w,) = run("adam", steps=1, grad=lambda w: torch.tensor([1e-3, 1e3], dtype=torch.float64), lr=0.01)
    assert (1.0 - w).tolist() == pytest.approx([0.01, 0.01], rel=1e-4)


@pytest.mark.parametrize(
    "name, reference",
    [
        ("adamw", lambda p: torch.optim.AdamW(p, lr=0.01, betas=(0.8, 0.99), eps=1e-7, weight_decay=0.1)),
        ("rmsprop", lambda p: torch.optim.RMSprop(p, lr=0.01, alpha=0.9, eps=1e-7, weight_decay=0.1)),
        ("adagrad", lambda p: torch.optim.Adagrad(p, lr=0.01, eps=1e-7, weight_decay=0.1)),
        ("adam", lambda p: torch.optim.Adam(p, lr=0.01, betas=(0.8, 0.99), eps=1e-7, weight_decay=0.1)),
        ("nesterov", lambda p: torch.optim.SGD(p, lr=0.01, momentum=0.8, nesterov=True, weight_decay=0.1)),
    ],
)
def test_small_network_matches_torch_optim(name, reference):
    """On a small network (no biases, so weight decay applies everywhere), 10 steps equal
    torch.optim configured by hand with the same hyperparameters."""

    def net():
        torch.manual_seed(0)
        return torch.nn.Sequential(
            torch.nn.Linear(4, 8, bias=False), torch.nn.Tanh(), torch.nn.Linear(8, 3, bias=False)
        )

    x, y = torch.randn(32, 4, generator=torch.Generator().manual_seed(1)), torch.arange(32) % 3
    ours, ref = net(), net()
    opts = [
        build_optimizer(
            ours,
            train_settings(
                optimizer=name, lr=0.01, beta1=0.8, beta2=0.99, eps=1e-7, alpha=0.9, momentum=0.8, weight_decay=0.1
            ),
        ),
        reference(ref.parameters()),
    ]
    for _ in range(10):
        for model, opt in zip((ours, ref), opts):
            opt.zero_grad()
            torch.nn.functional.cross_entropy(model(x), y).backward()
            opt.step()
    for a, b in zip(ours.parameters(), ref.parameters()):
        assert torch.equal(a, b)


def test_weight_decay_skips_biases():
    model = torch.nn.Linear(3, 2)
    opt = build_optimizer(model, train_settings(optimizer="sgd", weight_decay=0.5))
    groups = {id(p): g["weight_decay"] for g in opt.param_groups for p in g["params"]}
    assert groups[id(model.weight)] == 0.5 and groups[id(model.bias)] == 0.0


def test_sgd_weight_decay_equals_half_l2_penalty():
    """SGD(weight_decay = lam) equals adding (lam/2) ||w||^2 to the loss."""
    from runner.components.regularizers import penalty

    lam = 0.2
    a, b = quadratic_model(), quadratic_model()
    oa = build_optimizer(a, train_settings(optimizer="sgd", lr=0.05, weight_decay=lam))
    ob = build_optimizer(b, train_settings(optimizer="sgd", lr=0.05))
    tb = train_settings(l2=lam / 2)
    for _ in range(5):
        for model, opt, pen in ((a, oa, False), (b, ob, True)):
            opt.zero_grad()
            loss = 0.5 * (H * model.weight[0] ** 2).sum()
            if pen:
                loss = loss + penalty([model.weight], tb)
            loss.backward()
            opt.step()
    assert torch.allclose(a.weight, b.weight, atol=1e-14)


def test_adamw_decoupled_differs_from_adam_coupled():
    """Loshchilov & Hutter 2019: decoupled decay is not the coupled L2 of Adam."""
    adam = run("adam", steps=5, lr=0.05, weight_decay=0.1)[-1]
    adamw = run("adamw", steps=5, lr=0.05, weight_decay=0.1)[-1]
    assert not torch.allclose(adam, adamw, atol=1e-6)


def test_cross_field_rule_nesterov_needs_momentum():
    settings = resolve({"data": {"source": "iris"}, "train": {"optimizer": "nesterov", "momentum": 0.0}}, {})
    with pytest.raises(RecipeError, match="nesterov needs momentum > 0"):
        _check_rules(settings)


def test_every_optimizer_builds_and_steps():
    for name in OPTIMIZERS:
        got = run(name, steps=2, lr=0.01)
        assert torch.isfinite(got[-1]).all() and not torch.equal(got[-1], torch.ones(2, dtype=torch.float64))
