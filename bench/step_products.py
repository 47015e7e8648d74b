"""Benchmark: ways of computing the stacked step's hidden-layer products, timed side by side.

The hidden layers' forward pass is z = h W^T + b over K members: h (K, rows, in), W (K, out,
in) in nn.Linear's layout. The ways timed, each on the same operands in aligned blocks:
  - torch.baddbmm(b, h, W^T view)      (the stacked path until now: MKL, transposed operand)
  - torch.baddbmm(b, h, W^T copied)    (a contiguous copy of W^T made first, copy included)
  - numpy matmul(h, W^T view), + b     (numpy's BLAS, OpenBLAS in numpy's wheels)
  - numpy matmul(h, W^T copied), + b
  - numpy matmul(W, h^T) as (K, out, rows) (the output layer's transposed form)
for training mini-batches (64 rows) and evaluation chunks (512 rows), at one thread for
torch and numpy's BLAS. Rounds alternate the ways; each figure is the least of ROUNDS.

Run: python bench/step_products.py
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

import numpy as np
import torch
from threadpoolctl import threadpool_limits

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from runner.training.stacked_network import aligned  # noqa: E402

ROUNDS = 7
K = 16


def ways(rows: int, fin: int, fout: int):
    g = torch.Generator().manual_seed(0)
    h, W, z = aligned(K, (rows, fin)), aligned(K, (fout, fin)), aligned(K, (rows, fout))
    zt = aligned(K, (fout, rows))
    WT = aligned(K, (fin, fout))
    h.copy_(torch.randn(K, rows, fin, generator=g))
    W.copy_(torch.randn(K, fout, fin, generator=g))
    b = torch.randn(K, 1, fout, generator=g)
    hn, Wn, zn, WTn, ztn = h.numpy(), W.numpy(), z.numpy(), WT.numpy(), zt.numpy()
    bn = b.numpy()

    def torch_view():
        torch.baddbmm(b, h, W.transpose(1, 2), out=z)

    def torch_copy():
        WT.copy_(W.transpose(1, 2))
        torch.baddbmm(b, h, WT, out=z)

    def numpy_view():
        np.matmul(hn, Wn.transpose(0, 2, 1), out=zn)
        np.add(zn, bn, out=zn)

    def numpy_copy():
        np.copyto(WTn, Wn.transpose(0, 2, 1))
        np.matmul(hn, WTn, out=zn)
        np.add(zn, bn, out=zn)

    def numpy_transposed():
        np.matmul(Wn, hn.transpose(0, 2, 1), out=ztn)

    return {
        "torch.baddbmm, W^T view": torch_view,
        "torch.baddbmm, W^T copied": torch_copy,
        "numpy matmul, W^T view": numpy_view,
        "numpy matmul, W^T copied": numpy_copy,
        "numpy matmul, (out, rows)": numpy_transposed,
    }


def best(fn, repeat: int) -> float:
    start = time.perf_counter()
    for _ in range(repeat):
        fn()
    return (time.perf_counter() - start) / repeat


def main() -> None:
    torch.set_num_threads(1)
    with threadpool_limits(1, user_api="blas"):
        print(f"# bench/step_products.py, {time.strftime('%Y-%m-%d %H:%M')}, torch {torch.__version__}, K = {K}")
        for rows in (64, 512):
            for fin, fout in ((64, 128), (128, 128), (64, 64)):
                fns = ways(rows, fin, fout)
                for fn in fns.values():
                    fn()
                times = dict.fromkeys(fns, float("inf"))
                repeat = max(5, int(2e7 / (K * rows * fin * fout)))
                for _ in range(ROUNDS):
                    for name, fn in fns.items():
                        times[name] = min(times[name], best(fn, repeat))
                base = times["torch.baddbmm, W^T view"]
                flops = 2 * K * rows * fin * fout
                print(f"rows {rows:>3}, {fin:>3} -> {fout:>3}:")
                for name, t in times.items():
                    print(f"  {name:<28} {t * 1e6:8.1f} us  {flops / t / 1e9:6.1f} GFLOP/s  {base / t:5.2f}x")


if __name__ == "__main__":
    main()
