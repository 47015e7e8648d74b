"""K same-shaped MLPs as one computation: batched forward and backward, written out.

Layer i of member k has weights ``weights[i][k]`` (out, in), nn.Linear's layout, and bias
``biases[i][k]`` (out,). All parameters live in one flat buffer and all gradients in
another, each layer's block contiguous, so the optimizer sees a few large tensors.

Hidden layers run as torch.baddbmm over the member axis, (K, rows, in) -> (K, rows, out).
The output layer is computed transposed, (K, out, in) @ (K, in, rows) -> (K, out, rows):
with ten or so outputs a matrix product whose last axis is the output width runs several
times slower on a CPU than one whose last axis is the rows.

The backward pass is the chain rule by hand, with torch's own derivative kernels for each
activation (the ones autograd calls; tests compare every gradient with autograd on the
single-job network): skipping the autograd graph matters at these sizes, where the graph
costs about as much as the arithmetic.
"""
from __future__ import annotations

import torch
import torch.nn.functional as F

__all__ = ["StackedMLP", "cross_entropy_grad", "mse_grad"]

_aten = torch.ops.aten


def _activation(name: str, slope: float):
    """(forward, backward(grad, pre-activation, output)) with autograd's own derivatives."""
    if name == "relu":
        return torch.relu, lambda g, z, a: _aten.threshold_backward(g, a, 0)
    if name == "leaky_relu":
        return (lambda z: F.leaky_relu(z, slope)), lambda g, z, a: _aten.leaky_relu_backward(g, z, slope, False)
    if name == "tanh":
        return torch.tanh, lambda g, z, a: _aten.tanh_backward(g, a)
    if name == "sigmoid":
        return torch.sigmoid, lambda g, z, a: _aten.sigmoid_backward(g, a)
    if name == "elu":
        return F.elu, lambda g, z, a: _aten.elu_backward(g, 1.0, 1, 1, False, z)
    if name == "gelu":
        return F.gelu, lambda g, z, a: _aten.gelu_backward(g, z, approximate="none")
    raise ValueError(f"no stacked activation {name}")


class StackedMLP:
    def __init__(self, members: int, widths: list[int], activation: str, slope: float = 0.01,
                 dtype: torch.dtype = torch.float32):
        self.K = members
        shapes = list(zip(widths[1:], widths))  # (out, in) per layer
        sizes = [members * o * i for o, i in shapes] + [members * o for o, _ in shapes]
        self.flat = torch.zeros(sum(sizes), dtype=dtype)
        self.gflat = torch.zeros_like(self.flat)
        L = len(shapes)
        views = [t.view(members, -1) for t in self.flat.split(sizes)]
        gviews = [t.view(members, -1) for t in self.gflat.split(sizes)]
        self.weights = [v.view(members, o, i) for v, (o, i) in zip(views[:L], shapes)]
        self.biases = views[L:]
        self.gw = [v.view(members, o, i) for v, (o, i) in zip(gviews[:L], shapes)]
        self.gb = gviews[L:]
        self.params = self.weights + self.biases
        self.grads = self.gw + self.gb
        self.decays = [True] * L + [False] * L  # weight decay and penalties: weights only
        self.act, self.act_back = _activation(activation, slope)
        self.hidden: list[torch.Tensor] = []  # each hidden activation of the last forward
        self._saved = None

    def member(self, k: int) -> torch.Tensor:
        """A copy of member k's parameters, for restoring its best epoch later."""
        return torch.cat([p[k].reshape(-1) for p in self.params])

    def load_member(self, k: int, saved: torch.Tensor) -> None:
        offset = 0
        for p in self.params:
            n = p[k].numel()
            p[k].copy_(saved[offset:offset + n].view_as(p[k]))
            offset += n

    def forward(self, x: torch.Tensor, masks: list | None = None, keep: bool = False) -> torch.Tensor:
        """Logits (K, outputs, rows) for inputs ``x`` (K, rows, features). ``masks``: for the
        input and each hidden layer, a scaled dropout mask (K, rows, width) or None.
        With ``keep``, holds what ``backward`` needs."""
        inputs, pre = [], []
        self.hidden = []
        h = x if not masks or masks[0] is None else x * masks[0]
        for i in range(len(self.weights) - 1):
            inputs.append(h)
            z = torch.baddbmm(self.biases[i].unsqueeze(1), h, self.weights[i].transpose(1, 2))
            a = self.act(z)
            pre.append(z)
            self.hidden.append(a)
            h = a if not masks or masks[i + 1] is None else a * masks[i + 1]
        inputs.append(h)
        self._saved = (inputs, pre, masks) if keep else None
        return torch.baddbmm(self.biases[-1].unsqueeze(2), self.weights[-1], h.transpose(1, 2))

    def backward(self, dout: torch.Tensor) -> None:
        """Gradients of the loss into ``gw``/``gb`` (overwritten) from its gradient with
        respect to the logits of the kept forward, (K, outputs, rows)."""
        inputs, pre, masks = self._saved
        torch.bmm(dout, inputs[-1], out=self.gw[-1])
        torch.sum(dout, dim=2, out=self.gb[-1])
        dh = torch.bmm(dout.transpose(1, 2), self.weights[-1])
        for i in reversed(range(len(self.weights) - 1)):
            if masks and masks[i + 1] is not None:
                dh = dh * masks[i + 1]
            dz = self.act_back(dh, pre[i], self.hidden[i])
            torch.bmm(dz.transpose(1, 2), inputs[i], out=self.gw[i])
            torch.sum(dz, dim=1, out=self.gb[i])
            if i > 0:
                dh = torch.bmm(dz, self.weights[i])
        self._saved = None


def cross_entropy_grad(logits: torch.Tensor, y: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """Mean cross-entropy per member of logits (K, classes, rows) for labels (K, rows), and
    its gradient (softmax - one-hot) / rows."""
    logp = torch.log_softmax(logits, dim=1)
    index = y.unsqueeze(1)
    loss = -logp.gather(1, index).mean(dim=(1, 2))
    grad = logp.exp_()
    grad.scatter_add_(1, index, torch.full(index.shape, -1.0, dtype=grad.dtype))
    return loss, grad.div_(y.shape[1])


def mse_grad(out: torch.Tensor, y: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """Mean squared error per member of outputs (K, 1, rows) for targets (K, rows), and its gradient."""
    diff = out[:, 0, :] - y
    return (diff * diff).mean(dim=1), (diff * (2.0 / y.shape[1])).unsqueeze(1)
