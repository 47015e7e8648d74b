"""stacked_mlp: the hand-written forward and backward against torch autograd on the
single-job path's network (nn.Linear layers built by runner.training.models), member by member."""

import pytest
import torch
import torch.nn.functional as F

from runner.components.activations import ACTIVATIONS, make_activation
from runner.training.stacked_network import StackedMLP, cross_entropy_grad, mse_grad


def reference(net: StackedMLP, k: int, activation: str, slope: float, train: bool = True):
    """Member k as nn.Linear (and nn.BatchNorm1d) layers holding the same weights (float64)."""
    layers = []
    for i, (w, b) in enumerate(zip(net.weights, net.biases)):
        lin = torch.nn.Linear(w.shape[2], w.shape[1]).double()
        with torch.no_grad():
            lin.weight.copy_(w[k])
            lin.bias.copy_(b[k])
        layers.append(lin)
        if i < len(net.weights) - 1:
            if net.norms:
                norm = torch.nn.BatchNorm1d(w.shape[1]).double().train(train)
                bn = net.norms[i]
                with torch.no_grad():
                    norm.weight.copy_(bn.gamma[k, 0])
                    norm.bias.copy_(bn.beta[k, 0])
                    norm.running_mean.copy_(bn.running_mean[k])
                    norm.running_var.copy_(bn.running_var[k])
                layers.append(norm)
            layers.append(make_activation(activation, slope))
    return layers


def run_reference(layers, x, masks):
    h = x if masks is None or masks[0] is None else x * masks[0]
    j = 1
    for layer in layers:
        h = layer(h)
        if not isinstance(layer, (torch.nn.Linear, torch.nn.BatchNorm1d)):
            if masks is not None and masks[j] is not None:
                h = h * masks[j]
            j += 1
    return h


@pytest.mark.parametrize("norm", ["none", "batch", "running"])
@pytest.mark.parametrize("activation", sorted(ACTIVATIONS))
@pytest.mark.parametrize("task", ["classification", "regression"])
def test_gradients_equal_autograd(activation, task, norm):
    """Loss and every gradient equal autograd's on nn.Linear layers, with batch normalization
    (nn.BatchNorm1d) by the batch's statistics (training) or the running ones (eval mode),
    and the running statistics updated as nn.BatchNorm1d updates them."""
    g = torch.Generator().manual_seed(7)
    K, rows, widths, slope = 3, 9, [5, 8, 6, 4 if task == "classification" else 1], 0.1
    net = StackedMLP(K, widths, activation, slope, dtype=torch.float64, batch_norm=norm != "none")
    net.flat.copy_(torch.randn(net.flat.shape, generator=g, dtype=torch.float64))
    if norm != "none":
        net.stats.copy_(torch.rand(net.stats.shape, generator=g, dtype=torch.float64) + 0.5)
    references = [reference(net, k, activation, slope, train=norm == "batch") for k in range(K)]
    x = torch.randn(K, rows, widths[0], generator=g, dtype=torch.float64)
    keep = [(torch.rand(K, rows, w, generator=g) > 0.3).double() / 0.7 for w in widths[:-1]]
    masks = [keep[0], None, keep[2]]  # input dropout, none after layer 1, dropout after layer 2
    train = norm == "batch"
    if task == "classification":
        y = torch.randint(0, widths[-1], (K, rows), generator=g)
        loss, dout = cross_entropy_grad(net.forward(x, masks, keep=True, train=train), y)
    else:
        y = torch.randn(K, rows, generator=g, dtype=torch.float64)
        loss, dout = mse_grad(net.forward(x, masks, keep=True, train=train), y)
    net.backward(dout)
    for k in range(K):
        layers = references[k]
        out = run_reference(layers, x[k], [m if m is None else m[k] for m in masks])
        ref = F.cross_entropy(out, y[k]) if task == "classification" else F.mse_loss(out.squeeze(1), y[k])
        ref.backward()
        assert float(loss[k]) == pytest.approx(ref.item(), rel=1e-12)
        linears = [m for m in layers if isinstance(m, torch.nn.Linear)]
        for i, lin in enumerate(linears):
            assert torch.allclose(net.gw[i][k], lin.weight.grad, rtol=1e-10, atol=1e-12), (activation, i)
            assert torch.allclose(net.gb[i][k], lin.bias.grad, rtol=1e-10, atol=1e-12), (activation, i)
        for bn, ref in zip(net.norms, [m for m in layers if isinstance(m, torch.nn.BatchNorm1d)]):
            assert torch.allclose(bn.dgamma[k], ref.weight.grad, rtol=1e-10, atol=1e-12)
            assert torch.allclose(bn.dbeta[k], ref.bias.grad, rtol=1e-10, atol=1e-12)
            assert torch.allclose(bn.running_mean[k], ref.running_mean, rtol=1e-12)  # updated alike
            assert torch.allclose(bn.running_var[k], ref.running_var, rtol=1e-12)


def test_member_round_trip_and_layout():
    net = StackedMLP(2, [3, 4, 2], "relu")
    params = net.weights + net.biases
    for i, p in enumerate(params):
        p.fill_(i + 1.0)
    assert float(net.flat.sum()) == 2 * ((3 * 4) * 1 + (4 * 2) * 2 + 4 * 3 + 2 * 4)  # views of one buffer
    assert float((net.flat * net.is_weight).sum()) == 2 * (3 * 4 * 1 + 4 * 2 * 2)
    saved = net.member(1)
    assert saved.numel() == 3 * 4 + 4 * 2 + 4 + 2
    net.flat[1].zero_()
    net.load_member(1, saved)
    assert all(torch.equal(p[0], p[1]) for p in params)
    assert [tuple(w.shape) for w in net.weights] == [(2, 4, 3), (2, 2, 4)]  # nn.Linear's (out, in)
