"""Benchmark: the stacked path's training time against JAX's whole-training jit(vmap), side by
side in one run, on the same grid, data splits and initial weights.

JAX is never a dependency of the project: this script makes its own virtual environment
(bench/.venv-jax, ignored by git) with `python -m venv` and installs jax there with pip on
first use, then runs the JAX side in a child process of that environment. Both sides are
pinned to the same single CPU core and run one thread; rounds alternate (the tool's group
here, then the child's compiled training, ROUNDS times) and each side's figure is the
least of its rounds. JAX's compile time is reported apart: the comparison is of run time.

The grid is bench/stacking.py's grid A: 16 Adam jobs on digits, MLP 64-128-128-10, batch
64, 10 epochs, val 0.2, with each epoch's validation loss and accuracy. Both sides train
every member from the tool's own initial weights, on its own split and shuffled order
(JAX draws its own orders), with Adam as torch.optim.Adam defines it; the final validation
accuracies are printed side by side as a check that both compute the same training.
The tool's group also builds itself and computes diagnostics and final metrics that the JAX
side does not: their time is clocked apart (EXTRAS), and both figures are printed.

Run: python bench/jax_compare.py [--rounds N]
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import textwrap
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
VENV = ROOT / "bench" / ".venv-jax"
sys.path.insert(0, str(ROOT))

GRID = """
name = "jax-compare"
seeds = [{seeds}]
[data]
source = "digits"
split = {{ val = 0.2, test = 0.0 }}
[model]
hidden = [128, 128]
[train]
optimizer = "adam"
lr = 1e-3
batch_size = 64
epochs = 10
"""

CHILD = r"""
import os, sys, time
os.environ.setdefault("XLA_FLAGS", "--xla_cpu_multi_thread_eigen=false intra_op_parallelism_threads=1")
import numpy as np
import jax, jax.numpy as jnp

d = np.load(sys.argv[1])
Xtr, ytr, Xva, yva = (jnp.asarray(d[k]) for k in ("Xtr", "ytr", "Xva", "yva"))
params0 = [(jnp.asarray(d[f"W{i}"]), jnp.asarray(d[f"b{i}"])) for i in range(int(d["layers"]))]
EPOCHS, BATCH, LR, B1, B2, EPS = int(d["epochs"]), int(d["batch"]), 1e-3, 0.9, 0.999, 1e-8
n = Xtr.shape[1]
full, rest = divmod(n, BATCH)

def forward(params, x):
    for W, b in params[:-1]:
        x = jax.nn.relu(x @ W.T + b)
    W, b = params[-1]
    return x @ W.T + b

def loss_fn(params, x, y):
    logp = jax.nn.log_softmax(forward(params, x))
    return -jnp.mean(jnp.take_along_axis(logp, y[:, None], axis=1))

def adam(params, grads, m, v, t):
    m = jax.tree.map(lambda m, g: B1 * m + (1 - B1) * g, m, grads)
    v = jax.tree.map(lambda v, g: B2 * v + (1 - B2) * g * g, v, grads)
    c1, c2 = 1 - B1 ** t, 1 - B2 ** t
    params = jax.tree.map(lambda p, m, v: p - LR / c1 * m / (jnp.sqrt(v / c2) + EPS), params, m, v)
    return params, m, v

def step(state, batch):
    params, m, v, t = state
    x, y = batch
    loss, grads = jax.value_and_grad(loss_fn)(params, x, y)
    params, m, v = adam(params, grads, m, v, t + 1)
    return (params, m, v, t + 1), loss

def train_one(params, X, y, Xv, yv, key):
    zeros = jax.tree.map(jnp.zeros_like, params)
    def epoch(carry, key):
        params, m, v, t = carry
        order = jax.random.permutation(key, n)
        Xe, ye = X[order], y[order]
        xb = Xe[: full * BATCH].reshape(full, BATCH, -1)
        yb = ye[: full * BATCH].reshape(full, BATCH)
        (params, m, v, t), losses = jax.lax.scan(step, (params, m, v, t), (xb, yb))
        if rest:
            (params, m, v, t), last = step((params, m, v, t), (Xe[full * BATCH :], ye[full * BATCH :]))
            losses = jnp.concatenate([losses, last[None]])
        logits = forward(params, Xv)
        val_loss = -jnp.mean(jnp.take_along_axis(jax.nn.log_softmax(logits), yv[:, None], axis=1))
        val_acc = jnp.mean(jnp.argmax(logits, axis=1) == yv)
        return (params, m, v, t), (losses.mean(), val_loss, val_acc)
    keys = jax.random.split(key, EPOCHS)
    (params, _, _, _), curves = jax.lax.scan(epoch, (params, zeros, zeros, 0), keys)
    return params, curves

train_all = jax.jit(jax.vmap(train_one))
keys = jax.random.split(jax.random.PRNGKey(0), Xtr.shape[0])
args = (params0, Xtr, ytr, Xva, yva, keys)
start = time.perf_counter()
compiled = train_all.lower(*args).compile()
print("compile", time.perf_counter() - start, flush=True)
for line in sys.stdin:
    start = time.perf_counter()
    params, curves = jax.block_until_ready(compiled(*args))
    print("run", time.perf_counter() - start, " ".join(f"{a:.4f}" for a in np.asarray(curves[2][:, -1])), flush=True)
"""


def ensure_venv() -> Path:
    python = VENV / "bin" / "python"
    if not python.exists():
        subprocess.run([sys.executable, "-m", "venv", str(VENV)], check=True)
    probe = subprocess.run([str(python), "-c", "import jax"], capture_output=True)
    if probe.returncode != 0:
        subprocess.run([str(python), "-m", "pip", "install", "-q", "jax", "jaxlib", "numpy"], check=True)
    return python


def tool_side(tmp: Path):
    """The grid, its stacked group and the arrays the JAX side needs (splits, initial weights)."""
    from runner.execution.executors import prepare_process
    from runner.recipe.grid import expand
    from runner.recipe.loader import parse_recipe
    from runner.training.stacked import StackedBackend

    text = GRID.format(seeds=", ".join(str(s) for s in range(1, 17)))
    grid = expand(parse_recipe(textwrap.dedent(text), tmp / "jax.toml"))
    prepare_process(1, grid.datasets)
    specs = [j.spec() for j in grid]
    ds = grid.datasets[specs[0].data_id]
    backend = StackedBackend(specs, ds)  # the same initial weights the group below starts from
    arrays = {
        "Xtr": backend.Xtr.contiguous().numpy(),
        "ytr": backend.ytr.numpy(),
        "Xva": backend.Xva.contiguous().numpy(),
        "yva": np.stack([sp.y_val for sp in backend.splits]).astype(np.int32),
        "layers": len(backend.net.weights),
        "epochs": specs[0].settings.train.epochs,
        "batch": backend.batch,
    }
    for i, (w, b) in enumerate(zip(backend.net.weights, backend.net.biases)):
        arrays[f"W{i}"], arrays[f"b{i}"] = w.numpy().copy(), b.numpy().copy()
    np.savez(tmp / "arrays.npz", **arrays)
    return specs, ds


# What the tool's group does beyond what the JAX side times (its compiled epochs with
# per-epoch validation): building the group (splits, initial weights), the diagnostics at
# initialization and at the end, and the final train/val/test metrics.
EXTRAS = ("__init__", "initial_diagnostics", "final_metrics", "end_diagnostics")


def timed_extras() -> list[float]:
    """Wrap the stacked backend's EXTRAS with a clock (this benchmark's process only); the
    returned list's one entry accumulates their seconds."""
    from runner.training.stacked import StackedBackend

    spent = [0.0]
    for name in EXTRAS:
        original = getattr(StackedBackend, name)

        def clocked(self, *args, _original=original, **kwargs):
            start = time.perf_counter()
            try:
                return _original(self, *args, **kwargs)
            finally:
                spent[0] += time.perf_counter() - start

        setattr(StackedBackend, name, clocked)
    return spent


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--rounds", type=int, default=5)
    args = parser.parse_args()
    python = ensure_venv()
    core = min(os.sched_getaffinity(0))
    os.sched_setaffinity(0, {core})
    import torch

    from runner.training.loop import train_group

    version = subprocess.run([str(python), "-c", "import jax; print(jax.__version__)"], capture_output=True, text=True)
    print(
        f"# bench/jax_compare.py, {time.strftime('%Y-%m-%d %H:%M')}, torch {torch.__version__}, jax "
        f"{version.stdout.strip()}, both pinned to CPU {core}, one thread, load {os.getloadavg()[0]:.2f}"
    )
    with tempfile.TemporaryDirectory() as tmp:
        specs, ds = tool_side(Path(tmp))
        env = {**os.environ, "XLA_FLAGS": "--xla_cpu_multi_thread_eigen=false intra_op_parallelism_threads=1"}
        child = subprocess.Popen(
            ["taskset", "-c", str(core), str(python), "-c", CHILD, str(Path(tmp) / "arrays.npz")],
            stdin=subprocess.PIPE,
            stdout=subprocess.PIPE,
            text=True,
            env=env,
        )
        compile_s = float(child.stdout.readline().split()[1])
        ours, bare, theirs, ours_acc, jax_acc = [], [], [], None, None
        train_group(specs, ds)  # first calls of every kernel, as JAX's compile is set apart
        extras = timed_extras()
        for _ in range(args.rounds):
            extras[0] = 0.0
            start = time.perf_counter()
            results = train_group(specs, ds)
            ours.append(time.perf_counter() - start)
            bare.append(ours[-1] - extras[0])
            ours_acc = [r.curves["val_accuracy"][-1] for r in results]
            child.stdin.write("run\n")
            child.stdin.flush()
            _, seconds, *accs = child.stdout.readline().split()
            theirs.append(float(seconds))
            jax_acc = [float(a) for a in accs]
        child.stdin.close()
        child.wait()
    print(f"JAX compile (once): {compile_s:.2f} s")
    print(
        f"training time, least of {args.rounds} alternating rounds (all rounds: tool "
        f"{', '.join(f'{t:.2f}' for t in ours)}; its epochs alone {', '.join(f'{t:.2f}' for t in bare)}; "
        f"JAX {', '.join(f'{t:.2f}' for t in theirs)})"
    )
    print(f"  tool, stacked group of {len(specs)}, as a run trains it: {min(ours):.3f} s")
    print(f"  tool, its epochs alone (without {', '.join(EXTRAS)}): {min(bare):.3f} s")
    print(f"  JAX jit(vmap) whole training (epochs with per-epoch validation): {min(theirs):.3f} s")
    print(f"  tool / JAX: {min(ours) / min(theirs):.2f} as a run trains it; {min(bare) / min(theirs):.2f} epochs "
          "alone (goal <= 1.1)")  # fmt: skip
    print(f"final val accuracy, mean over members: tool {np.mean(ours_acc):.4f}, JAX {np.mean(jax_acc):.4f}")


if __name__ == "__main__":
    main()
