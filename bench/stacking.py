"""Benchmark: the same grids trained four ways, timed in one run on this machine.

  1. a plain one-job-at-a-time PyTorch loop written the ordinary way (DataLoader, nn.Sequential,
     torch.optim), 2. scikit-learn's MLPClassifier with the same architecture, solver, batch
     size and epochs, 3. the tool with stacking off, 4. the tool with stacking on;
all with one thread in one process, then the tool with its default worker count (each run
starts its own workers, as `recipe run` does; the fork server they come from starts once per
`recipe run`, so its start-up is measured and printed on its own).

Grid A: 16 jobs on digits, MLP 64-128-128-10, batch 64, 10 epochs, Adam lr 1e-3 (16 seeds).
Grid B: sgd / momentum / adam x L2 0 / 1e-4 x 3 seeds (18 jobs), same network.
Prints jobs per minute, the ratios, the arithmetic-bound time from this machine's measured
single-thread matmul rate, the tool's per-job overhead, and peak memory per worker process.

Each single-thread figure is the best of ROUNDS interleaved rounds (the machines are shared).

Run: python bench/stacking.py   (needs the test extra: psutil comes with dask.distributed)
"""

from __future__ import annotations

import os
import sys
import tempfile
import textwrap
import threading
import time
import warnings
from pathlib import Path

import torch

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from runner.execution.planning import execute, make_executor  # noqa: E402
from runner.recipe.grid import expand  # noqa: E402
from runner.recipe.loader import parse_recipe  # noqa: E402
from runner.store.database import Store  # noqa: E402

EPOCHS, BATCH, HIDDEN = 10, 64, (128, 128)
ROUNDS = 5
METHODS = ("plain PyTorch loop", "sklearn MLPClassifier", "tool, no stacking", "tool, stacked")

GRID_A = f"""
name = "bench-a"
seeds = [{", ".join(str(s) for s in range(1, 17))}]
[data]
source = "digits"
split = {{ val = 0.2, test = 0.0 }}
[model]
hidden = [128, 128]
[train]
optimizer = "adam"
lr = 1e-3
batch_size = {BATCH}
epochs = {EPOCHS}
"""

GRID_B = f"""
name = "bench-b"
seeds = [1, 2, 3]
[data]
source = "digits"
split = {{ val = 0.2, test = 0.0 }}
[model]
hidden = [128, 128]
[train]
batch_size = {BATCH}
epochs = {EPOCHS}
momentum = 0.9
[factors.optimizer]
"train.optimizer" = ["sgd", "momentum", "adam"]
"train.lr" = [0.1, 0.05, 1e-3]
[factors]
"train.l2" = [0.0, 1e-4]
"""


def matmul_gflops() -> tuple[float, float]:
    """Single-thread float32 512x512 matmul rate of torch and of numpy's BLAS, GFLOP/s (best of 5 rounds)."""
    from threadpoolctl import threadpool_limits

    torch.set_num_threads(1)
    a, b = torch.randn(512, 512), torch.randn(512, 512)
    an, bn = a.numpy(), b.numpy()
    rates = []
    with threadpool_limits(1, user_api="blas"):
        for mm in (lambda: a @ b, lambda: an @ bn):
            for _ in range(5):
                mm()
            best = float("inf")
            for _ in range(5):
                start = time.perf_counter()
                for _ in range(10):
                    mm()
                best = min(best, (time.perf_counter() - start) / 10)
            rates.append(2 * 512**3 / best / 1e9)
    return rates[0], rates[1]


def flops_per_job(n_train: int, n_val: int) -> float:
    widths = [64, *HIDDEN, 10]
    macs = sum(a * b for a, b in zip(widths, widths[1:]))
    # forward 2*MACs per row; backward about twice the forward; val forward each epoch
    return EPOCHS * (6 * macs * n_train + 2 * macs * n_val)


def grid_of(text: str):
    return expand(parse_recipe(textwrap.dedent(text), ROOT / "bench" / "bench.toml"))


def plain_torch(grid) -> float:
    """One job at a time, written the ordinary way."""
    from sklearn.model_selection import train_test_split
    from sklearn.preprocessing import StandardScaler
    from torch.utils.data import DataLoader, TensorDataset

    torch.set_num_threads(1)
    ds = next(iter(grid.datasets.values()))
    X = ds.X.reshape(len(ds.X), -1)
    start = time.perf_counter()
    for job in grid:
        t = job.config.settings["train"]
        torch.manual_seed(job.seed)
        Xtr, Xva, ytr, yva = train_test_split(X, ds.y, test_size=0.2, random_state=job.seed, stratify=ds.y)
        scaler = StandardScaler().fit(Xtr)
        train = TensorDataset(torch.tensor(scaler.transform(Xtr), dtype=torch.float32), torch.tensor(ytr))
        loader = DataLoader(train, batch_size=BATCH, shuffle=True)
        Xv, yv = torch.tensor(scaler.transform(Xva), dtype=torch.float32), torch.tensor(yva)
        model = torch.nn.Sequential(
            torch.nn.Linear(64, 128),
            torch.nn.ReLU(),
            torch.nn.Linear(128, 128),
            torch.nn.ReLU(),
            torch.nn.Linear(128, 10),
        )
        if t["optimizer"] == "adam":
            opt = torch.optim.Adam(model.parameters(), lr=t["lr"])
        else:
            opt = torch.optim.SGD(
                model.parameters(), lr=t["lr"], momentum=t["momentum"] if t["optimizer"] == "momentum" else 0
            )
        loss_fn = torch.nn.CrossEntropyLoss()
        for _ in range(EPOCHS):
            model.train()
            for xb, yb in loader:
                opt.zero_grad()
                loss = loss_fn(model(xb), yb)
                if t["l2"]:
                    loss = loss + t["l2"] * sum((p**2).sum() for n, p in model.named_parameters() if "weight" in n)
                loss.backward()
                opt.step()
            model.eval()
            with torch.no_grad():
                (model(Xv).argmax(1) == yv).float().mean().item()
    return time.perf_counter() - start


def sklearn_mlp(grid) -> float:
    from sklearn.exceptions import ConvergenceWarning
    from sklearn.model_selection import train_test_split
    from sklearn.neural_network import MLPClassifier
    from sklearn.preprocessing import StandardScaler
    from threadpoolctl import threadpool_limits

    ds = next(iter(grid.datasets.values()))
    X = ds.X.reshape(len(ds.X), -1)
    start = time.perf_counter()
    with threadpool_limits(1), warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        for job in grid:
            t = job.config.settings["train"]
            Xtr, Xva, ytr, yva = train_test_split(X, ds.y, test_size=0.2, random_state=job.seed, stratify=ds.y)
            scaler = StandardScaler().fit(Xtr)
            solver = "adam" if t["optimizer"] == "adam" else "sgd"
            clf = MLPClassifier(
                hidden_layer_sizes=HIDDEN,
                solver=solver,
                batch_size=BATCH,
                max_iter=EPOCHS,
                learning_rate_init=t["lr"],
                alpha=2 * t["l2"],
                random_state=job.seed,
                momentum=t["momentum"] if t["optimizer"] == "momentum" else 0.0,
                nesterovs_momentum=False,
                n_iter_no_change=EPOCHS + 1,
                tol=0.0,
            )
            clf.fit(scaler.transform(Xtr), ytr)
            clf.score(scaler.transform(Xva), yva)
    return time.perf_counter() - start


class PeakRSS:
    """Samples the resident memory of this process's children (the workers) every 50 ms."""

    def __init__(self):
        import psutil

        self.me = psutil.Process()
        self.peak = 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)

    def _run(self):
        while not self._stop.wait(0.05):
            for child in self.me.children(recursive=True):
                try:
                    self.peak = max(self.peak, child.memory_info().rss)
                except Exception:
                    pass

    def __enter__(self):
        self._thread.start()
        return self

    def __exit__(self, *exc):
        self._stop.set()
        self._thread.join()


def tool(grid, workers: int, stack: bool):
    """(wall seconds, sum of the jobs' own training seconds, peak worker RSS bytes)."""
    from runner.training import stacked as stacking

    stacking._SPLIT_CACHE.clear()  # each run starts as a fresh `recipe run` would
    with tempfile.TemporaryDirectory() as tmp, Store(Path(tmp) / "b.sqlite") as db:
        executor = make_executor("local", workers)
        peak = PeakRSS() if workers > 1 else None
        start = time.perf_counter()
        if peak:
            with peak:
                execute(grid, db, list(grid), executor, stack=stack)
        else:
            execute(grid, db, list(grid), executor, stack=stack)
        wall = time.perf_counter() - start
        trained = sum(r.duration for r in db.jobs())
        statuses = {r.status for r in db.jobs()}
        assert statuses == {"done"}, statuses
    torch.set_num_threads(1)
    return wall, trained, (peak.peak if peak else None)


class ProductClock:
    """Times the stacked path's matrix products inside a real run: runner.training.stacked_network's
    numpy and torch names are swapped, for the duration, for namespaces whose matmul and
    baddbmm (every product of the forward and backward passes) add their wall time to
    ``seconds``; everything else passes through unchanged. Each call's operand layouts
    (shapes and strides) are counted, so that ``replay`` can time the same calls alone."""

    def __init__(self):
        self.seconds = 0.0
        self.calls: dict[tuple, int] = {}

    def _timed(self, name, fn):
        def call(*args, **kwargs):
            start = time.perf_counter()
            try:
                return fn(*args, **kwargs)
            finally:
                self.seconds += time.perf_counter() - start
                key = (name, *(_layout(a) for a in (*args, kwargs["out"])))
                self.calls[key] = self.calls.get(key, 0) + 1

        return call

    def __enter__(self):
        import types

        import numpy as np

        from runner.training import stacked_network as stacked_mlp

        self._module, self._saved = stacked_mlp, (stacked_mlp.np, stacked_mlp.torch)
        timed_np, timed_torch = types.ModuleType("numpy"), types.ModuleType("torch")
        timed_np.__dict__.update(np.__dict__, matmul=self._timed("matmul", np.matmul))
        timed_torch.__dict__.update(torch.__dict__, baddbmm=self._timed("baddbmm", torch.baddbmm))
        stacked_mlp.np, stacked_mlp.torch = timed_np, timed_torch
        return self

    def __exit__(self, *exc):
        self._module.np, self._module.torch = self._saved

    def replay(self) -> float:
        """Seconds the recorded product calls take replayed alone: each distinct call (same
        shapes and strides, random operands) as many times as the run made it, back to back
        with warm caches, best of 3. The best these products can do on this machine inside
        any training loop that keeps this layout. One thread for numpy's BLAS as for torch, as
        in the run (the executor restores the process's own limits after a run, and numpy's
        default is a thread per core: the replay read 2-4x too fast without this)."""
        import numpy as np
        from threadpoolctl import threadpool_limits

        torch.set_num_threads(1)
        with threadpool_limits(1, user_api="blas"):
            return self._replay(np)

    def _replay(self, np) -> float:
        total = 0.0
        for (name, *layouts), count in self.calls.items():
            operands = [_operand(lay, torch if name == "baddbmm" else np) for lay in layouts]
            *ins, out = operands
            fn = (lambda: torch.baddbmm(*ins, out=out)) if name == "baddbmm" else (lambda: np.matmul(*ins, out=out))
            fn()
            best = float("inf")
            for _ in range(3):
                start = time.perf_counter()
                for _ in range(count):
                    fn()
                best = min(best, time.perf_counter() - start)
            total += best
        return total


def _layout(a) -> tuple:
    """(shape, strides in elements) of a numpy array or a torch tensor."""
    if isinstance(a, torch.Tensor):
        return tuple(a.shape), tuple(a.stride())
    return a.shape, tuple(s // a.itemsize for s in a.strides)


def _operand(layout: tuple, lib):
    """A float32 operand of random values with exactly this shape and these strides."""
    shape, strides = layout
    span = 1 + sum((n - 1) * s for n, s in zip(shape, strides))
    base = torch.randn(span)
    view = torch.as_strided(base, shape, strides)
    return view if lib is torch else view.numpy()


def fork_server_startup() -> float:
    """Seconds until the worker fork server has imported everything and forked a first child."""
    from runner.execution.forkserver import start_early, worker_context

    start = time.perf_counter()
    start_early()
    child = worker_context().Process(target=int)
    child.start()
    child.join()
    return time.perf_counter() - start


def main() -> None:
    torch.set_num_threads(1)
    torch.use_deterministic_algorithms(True)
    import resource

    torch_rate, numpy_rate = matmul_gflops()
    rate = max(torch_rate, numpy_rate)  # the bound uses the faster of the two
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()
    print(f"# recipe benchmark, {time.strftime('%Y-%m-%d')}, {cores} cores, torch {torch.__version__}")
    print(
        f"single-thread matmul rate (512x512 float32, best of 5): torch {torch_rate:.1f} GFLOP/s, "
        f"numpy's BLAS {numpy_rate:.1f} GFLOP/s"
    )
    for name, text in (("A: 16 x Adam", GRID_A), ("B: 3 optimizers x 2 L2 x 3 seeds", GRID_B)):
        grid = grid_of(text)
        jobs = len(grid)
        ds = next(iter(grid.datasets.values()))
        n_val = int(round(0.2 * len(ds.y)))
        bound = jobs * flops_per_job(len(ds.y) - n_val, n_val) / (rate * 1e9)
        print(f"\ngrid {name}: {jobs} jobs; arithmetic-bound time {bound:.2f} s ({bound / jobs * 1000:.0f} ms per job)")
        # Interleaved rounds, best of ROUNDS per method: this machine is shared, and a burst
        # of load in one measurement would otherwise decide a ratio.
        results = {label: float("inf") for label in METHODS}
        overheads = []
        for _ in range(ROUNDS):
            results["plain PyTorch loop"] = min(results["plain PyTorch loop"], plain_torch(grid))
            results["sklearn MLPClassifier"] = min(results["sklearn MLPClassifier"], sklearn_mlp(grid))
            wall, trained, _ = tool(grid, 1, stack=False)
            results["tool, no stacking"] = min(results["tool, no stacking"], wall)
            overheads.append((wall - trained) / trained)
            results["tool, stacked"] = min(results["tool, stacked"], tool(grid, 1, stack=True)[0])
        base = results["plain PyTorch loop"]
        print(f"one thread, one process (best of {ROUNDS} interleaved rounds):")
        for label, seconds in results.items():
            print(
                f"  {label:<24} {seconds:7.2f} s  {jobs / seconds * 60:8.0f} jobs/min  "
                f"{base / seconds:5.2f}x plain loop  {results['sklearn MLPClassifier'] / seconds:5.2f}x MLPClassifier"
            )
        overhead = sorted(overheads)[len(overheads) // 2]
        print(f"  tool overhead per job (scheduling, storing) beyond its training time: {overhead * 100:.1f}% (median)")
        print(f"  stacked time / arithmetic bound: {results['tool, stacked'] / bound:.1f}")
        # where the stacked time goes: the matrix products timed inside one more (uncounted) run
        with ProductClock() as clock:
            wall = tool(grid, 1, stack=True)[0]
        budget = results["sklearn MLPClassifier"] / 3
        print(
            f"  stacked, one more run with its matrix products timed in place: {wall:.2f} s, of which products "
            f"{clock.seconds:.2f} s ({clock.seconds / wall * 100:.0f}%), everything else {wall - clock.seconds:.2f} s; "
            f"3x MLPClassifier allows {budget:.2f} s in all"
        )
        alone = clock.replay()
        print(
            f"  the same product calls replayed alone (warm caches, best of 3): {alone:.2f} s, "
            f"{alone / budget * 100:.0f}% of that allowance, leaving {budget - alone:.2f} s for everything else"
        )
        if name.startswith("A"):
            print(
                f"worker fork server start-up, once per `recipe run` (it overlaps the main process's own "
                f"start-up there): {fork_server_startup():.1f} s; not in the timings below"
            )
        print(f"default worker count ({cores}):")
        for stack in (False, True):
            wall, _, peak = tool(grid, cores, stack=stack)
            label = "tool, stacked" if stack else "tool, no stacking"
            print(
                f"  {label:<24} {wall:7.2f} s  {jobs / wall * 60:8.0f} jobs/min  {base / wall:5.2f}x plain loop"
                f"  peak worker RSS {peak / 2**20:.0f} MB"
            )
    print(f"\nthis process's peak RSS: {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MB")


if __name__ == "__main__":
    main()
