"""Batch normalization over a member axis, forward and backward written out.

The stacked form of torch.nn.BatchNorm1d (Ioffe & Szegedy 2015) after a hidden layer of K
members: each member normalizes its own units over its own mini-batch rows, with its own
scale (gamma) and shift (beta), and keeps its own running mean and variance for evaluation,
as the single path's nn.BatchNorm1d does (eps 1e-5, momentum 0.1; the running variance
takes the unbiased batch variance, normalization the biased one). Every reduction runs over
a member's own rows, so a member's numbers do not depend on its group.
"""

from __future__ import annotations

import torch

__all__ = ["EPS", "MOMENTUM", "StackedBatchNorm"]

EPS = 1e-5
MOMENTUM = 0.1


class StackedBatchNorm:
    """One hidden layer's normalization: parameters and running statistics are (K, units)
    views (into the network's parameter and statistics buffers), activations (K, rows, units)."""

    def __init__(self, gamma, beta, dgamma, dbeta, running_mean, running_var):
        self.gamma, self.beta = gamma.unsqueeze(1), beta.unsqueeze(1)
        self.dgamma, self.dbeta = dgamma, dbeta
        self.running_mean, self.running_var = running_mean, running_var
        self._invstd: torch.Tensor | None = None

    def forward(self, z: torch.Tensor, out: torch.Tensor, xhat: torch.Tensor, train: bool) -> None:
        """``out`` = gamma * xhat + beta, with xhat (kept in ``xhat`` for the backward pass)
        normalized by the batch's statistics (``train``, which also updates the running
        ones) or by the running statistics."""
        if train:
            rows = z.shape[1]
            if rows < 2:  # as nn.BatchNorm1d refuses it
                raise ValueError(f"Expected more than 1 value per channel when training, got {rows} row")
            mean = z.mean(dim=1, keepdim=True)
            torch.sub(z, mean, out=xhat)
            var = torch.mul(xhat, xhat, out=out).mean(dim=1, keepdim=True)  # biased, two passes
            invstd = var.add(EPS).rsqrt_()
            self.running_mean.mul_(1 - MOMENTUM).add_(mean.squeeze(1), alpha=MOMENTUM)
            self.running_var.mul_(1 - MOMENTUM).add_(var.squeeze(1), alpha=MOMENTUM * rows / (rows - 1))
        else:
            invstd = self.running_var.add(EPS).rsqrt_().unsqueeze(1)
            torch.sub(z, self.running_mean.unsqueeze(1), out=xhat)
        xhat.mul_(invstd)
        torch.addcmul(self.beta, xhat, self.gamma, out=out)
        self._invstd, self._train = invstd, train

    def backward(self, dy: torch.Tensor, xhat: torch.Tensor, scratch: torch.Tensor) -> None:
        """The gradient at the layer's input into ``dy`` (overwritten), and gamma's and beta's
        gradients into their views; ``scratch`` is a buffer of dy's shape."""
        torch.sum(dy, dim=1, out=self.dbeta)
        torch.sum(torch.mul(dy, xhat, out=scratch), dim=1, out=self.dgamma)
        dy.mul_(self.gamma)  # now d xhat
        if self._train:  # the batch's statistics depend on every row: their terms too
            mean_dx = dy.mean(dim=1, keepdim=True)
            mean_dx_xhat = torch.mul(dy, xhat, out=scratch).mean(dim=1, keepdim=True)
            torch.mul(xhat, mean_dx_xhat, out=scratch)
            dy.sub_(scratch).sub_(mean_dx)
        dy.mul_(self._invstd)
