"""schedules: per-step learning rates against torch.optim.lr_scheduler."""

import pytest
import torch

from runner.components.lr_schedules import lr_at
from runner.recipe.loader import resolve


def train(**kw):
    return resolve({"data": {"source": "iris"}, "train": kw}, {}).train


def torch_lrs(make_scheduler, steps, lr=0.1):
    opt = torch.optim.SGD([torch.zeros(1, requires_grad=True)], lr=lr)
    sched = make_scheduler(opt)
    out = []
    for _ in range(steps):
        out.append(opt.param_groups[0]["lr"])
        opt.step()
        sched.step()
    return out


def test_cosine_matches_cosine_annealing_lr():
    """Loshchilov & Hutter 2017 cosine annealing to 0 over all steps = CosineAnnealingLR."""
    t = train(lr=0.1, schedule="cosine", epochs=5)
    ours = [lr_at(s, 7, t) for s in range(35)]
    ref = torch_lrs(lambda o: torch.optim.lr_scheduler.CosineAnnealingLR(o, T_max=35), 35)
    assert ours == pytest.approx(ref, abs=1e-12)


def test_step_matches_step_lr():
    t = train(lr=0.1, schedule="step", epochs=9, step_every=3, step_gamma=0.5)
    ours = [lr_at(s, 4, t) for s in range(36)]
    ref = torch_lrs(lambda o: torch.optim.lr_scheduler.StepLR(o, step_size=12, gamma=0.5), 36)
    assert ours == pytest.approx(ref, abs=1e-12)


def test_warmup_is_linear_then_cosine():
    t = train(lr=0.1, schedule="warmup_cosine", epochs=10, warmup_epochs=2)
    warm = [lr_at(s, 5, t) for s in range(10)]
    assert warm == pytest.approx([0.1 * (s + 1) / 10 for s in range(10)])
    assert lr_at(10, 5, t) == pytest.approx(0.1)
    assert lr_at(30, 5, t) == pytest.approx(0.05)  # half-way through the cosine part


def test_constant():
    assert {lr_at(s, 3, train(lr=0.02)) for s in range(30)} == {0.02}
