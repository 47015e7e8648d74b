"""K same-shaped MLPs as one computation: batched forward and backward, written out.

Layer i of member k has weights ``weights[i][k]`` (out, in), nn.Linear's layout, and bias
``biases[i][k]`` (out,), all views into row k of one (K, P) buffer ``flat`` (gradients in
``gflat``), so the optimizer, clipping and penalties act on every member's parameters
with one operation and a per-member column.

Hidden layers run as torch.baddbmm over the member axis, (K, rows, in) -> (K, rows, out).
The output layer is computed transposed, (K, out, in) @ (K, in, rows) -> (K, out, rows):
with ten or so outputs a matrix product whose last axis is the output width runs slower on
a CPU than one whose last axis is the rows.

The backward pass is the chain rule by hand, with torch's own derivative kernels for each
activation (the ones autograd calls; tests compare every gradient with autograd on the
single-job network): skipping the autograd graph matters at these sizes, where the graph
costs about as much as the arithmetic. Training steps write into buffers kept from step
to step (``_Workspace``) rather than fresh tensors, as few as the chain rule allows: at
these sizes the products run at half their in-cache rate once the step's working set
spills out of the core's cache.
"""

from __future__ import annotations

import math

import numpy as np
import torch

from runner.components.activations import stacked_activation

__all__ = ["ALIGN", "StackedMLP", "aligned", "cross_entropy_grad", "mse_grad"]

ALIGN = 64  # elements: every member's block in a stacked buffer starts at a multiple of this


def _stride(size: int) -> int:
    return -(-size // ALIGN) * ALIGN


def aligned(members: int, shape: tuple[int, ...], dtype=torch.float32) -> torch.Tensor:
    """A zeroed (members, *shape) tensor in which each member has its own block of a
    multiple of ALIGN elements (``block`` gives the whole blocks).

    A member's numbers must not depend on its place in its group, so that a job trains to
    the same bits alone or among others and groups can be formed from whatever is left to
    run. Members packed back to back are tied to their places in two ways: BLAS kernels
    (MKL's among them) take different paths for different alignments of the same matrix,
    and a vectorized loop over a buffer ends in a scalar tail (other instructions, other
    roundings for exp, tanh, erf or a fused multiply-add) on whichever member comes last.
    Here every member's matrices start 256-byte aligned (torch allocates at 64 bytes), and
    elementwise passes run over whole blocks (``block``), which no vector step straddles
    and no tail reaches."""
    size = math.prod(shape)
    return torch.zeros(members, _stride(size), dtype=dtype)[:, :size].view(members, *shape)


def block(t: torch.Tensor) -> torch.Tensor:
    """The (members, stride) contiguous blocks behind a tensor made by ``aligned``."""
    size = math.prod(t.shape[1:])
    return t.as_strided((t.shape[0], _stride(size)), (_stride(size), 1))


# Products go through numpy's BLAS (OpenBLAS in numpy's wheels) on numpy views of the same
# memory: measured faster than torch.bmm for these small products (bench/RESULTS.md),
# except where the second operand is a transposed view, which is the hidden layers'
# forward (torch.baddbmm there).


def _T(a: np.ndarray) -> np.ndarray:
    return a.transpose(0, 2, 1)


class _Workspace:
    """Buffers of one forward-backward at a given row count, reused step after step: fresh
    half-megabyte tensors each step cost more in page faults (and, in torch's deterministic
    mode, in filling them) than their arithmetic. Backward's buffers come on first need.
    Each is ``aligned``: a member's block sits at the same alignment in every group."""

    def __init__(self, K: int, rows: int, widths: list[int], in_place: bool, dtype, batch_norm: bool = False):
        self.new = lambda w: aligned(K, (rows, w), dtype)
        self.widths, self.batch_norm = widths, batch_norm
        hidden = widths[1:-1]
        self.z = [self.new(w) for w in hidden]  # each hidden layer's product plus bias
        self.xhat = [self.new(w) for w in hidden] if batch_norm else None  # normalized z
        self.pre = [self.new(w) for w in hidden] if batch_norm else self.z  # the activation's input
        self.a = self.pre if in_place else [self.new(w) for w in hidden]
        self.preb, self.ab = [block(z) for z in self.pre], [block(a) for a in self.a]
        self.logits = aligned(K, (widths[-1], rows), dtype)
        self._train = None
        self._np: dict = {}

    def arr(self, name: str, i: int | None = None) -> np.ndarray:
        """The numpy view of a buffer (made once)."""
        key = (name, i)
        if key not in self._np:
            t = getattr(self, name)
            self._np[key] = (t if i is None else t[i]).numpy()
        return self._np[key]

    def __getattr__(self, name):  # dropped, dh, dhb, dout, scratch: only for training steps
        if name not in ("dropped", "dh", "dhb", "dout", "scratch"):
            raise AttributeError(name)
        if self._train is None:
            K, outputs, rows = self.logits.shape
            dh = [self.new(w) for w in self.widths[1:-1]]
            self._train = {
                "dropped": [self.new(w) for w in self.widths[:-1]],  # after dropout
                "dh": dh,  # gradients at each hidden layer's output, then (in place) its input
                "dhb": [block(d) for d in dh],
                "dout": aligned(K, (outputs, rows), self.logits.dtype),
                "scratch": [self.new(w) for w in self.widths[1:-1]] if self.batch_norm else None,
            }
        return self._train[name]


class StackedMLP:
    def __init__(
        self,
        members: int,
        widths: list[int],
        activation: str,
        slope: float = 0.01,
        dtype: torch.dtype = torch.float32,
        batch_norm: bool = False,
    ):
        self.K = members
        self.widths = list(widths)
        self.dtype = dtype
        self.batch_norm = batch_norm
        shapes = list(zip(widths[1:], widths))  # (out, in) per layer
        hidden = widths[1:-1]
        self.P = P = sum(o * i + o for o, i in shapes) + (2 * sum(hidden) if batch_norm else 0)
        # member k's parameters are row k of a (K, P) buffer, layer by layer: weights then bias;
        # rows padded with zeros to a multiple of ALIGN (see ``aligned``), which every
        # optimizer step and penalty leaves at zero
        self.flat = torch.zeros(members, -(-P // ALIGN) * ALIGN, dtype=dtype)
        self.gflat = torch.zeros_like(self.flat)
        self.is_weight = torch.zeros(self.flat.shape[1], dtype=dtype)  # 1 over weights, 0 over biases
        self.weights, self.biases, self.gw, self.gb = [], [], [], []
        offset = 0
        for o, i in shapes:
            self.weights.append(self.flat[:, offset : offset + o * i].view(members, o, i))
            self.gw.append(self.gflat[:, offset : offset + o * i].view(members, o, i))
            self.is_weight[offset : offset + o * i] = 1.0
            offset += o * i
            self.biases.append(self.flat[:, offset : offset + o])
            self.gb.append(self.gflat[:, offset : offset + o])
            offset += o
        self.norms: list = []  # each hidden layer's StackedBatchNorm (batch_norm), after its bias
        if batch_norm:
            offset = self._add_norms(hidden, offset)
        self._w_np = [w.numpy() for w in self.weights]
        self._wT = [w.transpose(1, 2) for w in self.weights]  # views made once, not each step
        self._bias_rows = [b.unsqueeze(1) for b in self.biases[:-1]]
        self._bias_out = self.biases[-1].unsqueeze(2)
        self._gw_np = [g.numpy() for g in self.gw]
        self.act, self.act_back, self.in_place = stacked_activation(activation, slope)
        self.hidden: list[torch.Tensor] = []  # each hidden activation of the last forward
        self._work: dict[int, _Workspace] = {}
        self._saved = None

    def _add_norms(self, hidden: list[int], offset: int) -> int:
        """Batch normalization's gamma (from 1) and beta (from 0) after the layers in the
        parameter buffer (never decayed: is_weight 0), running statistics in ``stats``."""
        from runner.training.stacked_batchnorm import StackedBatchNorm

        self.stats = aligned(self.K, (2 * sum(hidden),), self.dtype)  # running means, then variances
        where = 0
        for o in hidden:
            gamma, beta = self.flat[:, offset : offset + o], self.flat[:, offset + o : offset + 2 * o]
            grads = self.gflat[:, offset : offset + o], self.gflat[:, offset + o : offset + 2 * o]
            mean, var = self.stats[:, where : where + o], self.stats[:, where + o : where + 2 * o]
            gamma.fill_(1.0)
            var.fill_(1.0)
            self.norms.append(StackedBatchNorm(gamma, beta, *grads, mean, var))
            offset, where = offset + 2 * o, where + 2 * o
        return offset

    def member(self, k: int) -> torch.Tensor:
        """A copy of member k's parameters (and running statistics), for restoring its best
        epoch later."""
        if self.batch_norm:
            return torch.cat([self.flat[k, : self.P], self.stats[k]])
        return self.flat[k, : self.P].clone()

    def load_member(self, k: int, saved: torch.Tensor) -> None:
        self.flat[k, : self.P].copy_(saved[: self.P])
        if self.batch_norm:
            self.stats[k].copy_(saved[self.P :])

    def workspace(self, rows: int) -> _Workspace:
        """The reused buffers for forward-backward passes over ``rows`` rows per member."""
        if rows not in self._work:
            self._work[rows] = _Workspace(self.K, rows, self.widths, self.in_place, self.dtype, self.batch_norm)
        return self._work[rows]

    def release(self, rows: int) -> None:
        self._work.pop(rows, None)

    def logits(self, x: torch.Tensor, chunk: int = 512) -> torch.Tensor:
        """Evaluation logits (K, outputs, rows) of many rows, ``chunk`` rows at a time
        through the reused buffers."""
        out = torch.zeros(x.shape[0], self.widths[-1], x.shape[1], dtype=self.dtype)
        for start in range(0, x.shape[1], chunk):
            out[:, :, start : start + chunk] = self.forward(x[:, start : start + chunk])
        return out

    def forward(
        self, x: torch.Tensor, masks: list | None = None, keep: bool = False, train: bool = False
    ) -> torch.Tensor:
        """Logits (K, outputs, rows) for inputs ``x`` (K, rows, features). ``masks``: for the
        input and each hidden layer, a scaled dropout mask (K, rows, width) or None.
        Works in the reused buffers of ``workspace(rows)``: the logits and ``hidden`` hold
        until the next forward over as many rows. With ``keep``, also holds what
        ``backward`` needs. ``train``: batch normalization by the batch's statistics (and
        updating the running ones), not by the running ones."""
        ws = self.workspace(x.shape[1])
        inputs = []  # each layer's input: (tensor, its numpy view or None)
        self.hidden = []
        h, h_np = x, None
        if masks and masks[0] is not None:
            h, h_np = torch.mul(x, masks[0], out=ws.dropped[0]), ws.arr("dropped", 0)
        for i in range(len(self.weights) - 1):
            inputs.append((h, h_np))
            torch.baddbmm(self._bias_rows[i], h, self._wT[i], out=ws.z[i])
            if self.norms:
                self.norms[i].forward(ws.z[i], ws.pre[i], ws.xhat[i], train)
            self.act(ws.preb[i], ws.ab[i])  # over whole blocks (see ``aligned``)
            h, h_np = ws.a[i], ws.arr("a", i)
            self.hidden.append(h)
            if masks and masks[i + 1] is not None:
                h, h_np = torch.mul(h, masks[i + 1], out=ws.dropped[i + 1]), ws.arr("dropped", i + 1)
        inputs.append((h, h_np))
        np.matmul(self._w_np[-1], _T(h_np if h_np is not None else h.numpy()), out=ws.arr("logits"))
        ws.logits.add_(self._bias_out)
        self._saved = (inputs, ws, masks) if keep else None
        return ws.logits

    def backward(self, dout: torch.Tensor) -> None:
        """Gradients of the loss into ``gw``/``gb`` (overwritten) from its gradient with
        respect to the logits of the kept forward, (K, outputs, rows)."""
        inputs, ws, masks = self._saved
        inputs = [a if a is not None else t.numpy() for t, a in inputs]
        dout = ws.dout.copy_(dout)  # an aligned block per member, as every product operand
        d = ws.arr("dout")
        np.matmul(d, inputs[-1], out=self._gw_np[-1])
        torch.sum(dout, dim=2, out=self.gb[-1])
        last = len(self.weights) - 1
        if last > 0:
            np.matmul(_T(d), self._w_np[-1], out=ws.arr("dh", last - 1))
        for i in reversed(range(last)):
            dh = ws.dh[i]
            if masks and masks[i + 1] is not None:
                dh.mul_(masks[i + 1])
            # elementwise, so it may write over its own input: one buffer less to keep in cache;
            # over whole blocks (see ``aligned``)
            self.act_back(ws.dhb[i], None if self.in_place else ws.preb[i], ws.ab[i], ws.dhb[i])
            if self.norms:
                self.norms[i].backward(dh, ws.xhat[i], ws.scratch[i])
            dz, dz_np = dh, ws.arr("dh", i)
            np.matmul(_T(dz_np), inputs[i], out=self._gw_np[i])
            torch.sum(dz, dim=1, out=self.gb[i])
            if i > 0:
                np.matmul(dz_np, self._w_np[i], out=ws.arr("dh", i - 1))
        self._saved = None


def cross_entropy_grad(logits: torch.Tensor, y: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """Mean cross-entropy per member of logits (K, classes, rows) for labels (K, rows), and
    its gradient (softmax - one-hot) / rows. Both kernels work member by member (over the
    rows of one member at a time): an exp over the whole (K, classes, rows) buffer would
    end in a scalar tail on the last member only."""
    index = y.unsqueeze(1)
    loss = torch.log_softmax(logits, dim=1).gather(1, index).mean(dim=(1, 2)).neg_()
    grad = torch.softmax(logits, dim=1)
    grad.scatter_add_(1, index, _minus_ones(index.shape, grad.dtype))
    return loss, grad.div_(y.shape[1])


_MINUS_ONES: dict = {}


def _minus_ones(shape, dtype) -> torch.Tensor:
    """A tensor of -1 of this shape, made once (read only)."""
    key = (tuple(shape), dtype)
    if key not in _MINUS_ONES:
        _MINUS_ONES[key] = torch.full(shape, -1.0, dtype=dtype)
    return _MINUS_ONES[key]


def mse_grad(out: torch.Tensor, y: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """Mean squared error per member of outputs (K, 1, rows) for targets (K, rows), and its gradient."""
    diff = out[:, 0, :] - y
    return (diff * diff).mean(dim=1), (diff * (2.0 / y.shape[1])).unsqueeze(1)
