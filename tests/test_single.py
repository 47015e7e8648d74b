"""single: convolutional jobs train channels-last (faster on a CPU), computing what the same
network computes on ordinary contiguous tensors."""

import copy
import textwrap

import torch

from runner.execution.executors import prepare_process
from runner.recipe.grid import expand
from runner.recipe.loader import parse_recipe
from runner.training.single import SingleBackend

CNN = """
name = "cnn"
seeds = [1]
[data]
source = "digits"
[model]
kind = "cnn"
channels = [8, 16]
batch_norm = true
hidden = [32]
[train]
batch_size = 32
epochs = 1
"""


def test_a_cnn_trains_channels_last_and_agrees_with_contiguous_tensors(tmp_path):
    grid = expand(parse_recipe(textwrap.dedent(CNN), tmp_path / "c.toml"))
    prepare_process(1, grid.datasets)
    spec = next(iter(grid)).spec()
    backend = SingleBackend(spec, grid.datasets[spec.data_id])
    convs = [m for m in backend.net.modules() if isinstance(m, torch.nn.Conv2d)]
    assert convs and all(c.weight.is_contiguous(memory_format=torch.channels_last) for c in convs)
    assert backend.Xtr.is_contiguous(memory_format=torch.channels_last)
    plain = copy.deepcopy(backend.net).to(memory_format=torch.contiguous_format)
    x, y = backend.Xtr[:64], backend.ytr[:64]
    for net, inputs in ((backend.net, x), (plain, x.contiguous())):
        torch.nn.functional.cross_entropy(net(inputs), y).backward()
    for a, b in zip(backend.net.parameters(), plain.parameters()):  # torch's own kernels on either layout
        assert torch.allclose(a.grad, b.grad, rtol=1e-4, atol=1e-6)
