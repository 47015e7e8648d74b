"""Benchmark: what the user waits for. Wall time of whole `recipe` commands, against the
training time inside them, timed in one run on this machine.

For a digits MLP grid of 1, 16, 64 and 256 jobs, a 16-job grid on a 20,000-row CSV
(synthetic: written by ``write_csv`` below from a seeded generator; invented numbers, not
measurements of anything) and an adaptive recipe (16 digits configurations raced over up to
6 seeds; "jobs" counts those it trained), each `recipe run` is a fresh process on a fresh
store:
  - wall time with the default options and with ``--workers 1`` (alternating, ROUNDS rounds
    each, the least of each: the machine is shared, so paired rounds keep a burst of load
    from deciding a ratio),
  - the summed training time the store records for the jobs (a stacked member is stored
    with its group's time divided by its members), and wall / training,
  - a no-op rerun (everything stored) and `recipe board`,
and, for a 16-configuration grid: the time to extend a finished 3-seed grid to 5 seeds,
against training those 2 seeds alone in a fresh store (both whole commands).

Goals (issue 22): wall <= 1.5x summed training from 64 jobs up and <= training + 2 s for
every grid; the default never slower than --workers 1; extension <= 1.2x the new jobs'
own run; no-op rerun and board under 1.5 s. The first line also times the floor under every
training run: a fresh interpreter importing torch; "tool" is wall - training - floor.

Run: python bench/wall.py [--rounds N] [--only NAME ...] [--compare OTHER_CHECKOUT]
(--compare times another checkout of the project alongside, each command alternating
between the two: its rows follow this tree's, marked "(other)".)
"""

from __future__ import annotations

import argparse
import os
import sqlite3
import subprocess
import sys
import tempfile
import textwrap
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
ENV = {**os.environ, "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}

DIGITS = """
name = "{name}"
seeds = {seeds}
[data]
source = "digits"
[model]
hidden = [64, 64]
[train]
optimizer = "adam"
lr = 1e-3
batch_size = 64
epochs = 10
[factors]
{factors}
"""

CSV = """
name = "{name}"
seeds = {seeds}
[data]
source = "wall.csv"
target = "label"
[model]
hidden = [64, 64]
[train]
optimizer = "adam"
batch_size = 64
epochs = 5
[factors]
{factors}
"""

LR = '"train.lr" = [1e-3, 3e-3, 1e-2, 3e-2]'
OPT = '"train.optimizer" = ["sgd", "momentum", "adam", "adamw"]'
L2 = '"train.l2" = [0.0, 1e-5, 1e-4, 1e-3]'

# name -> (template, seeds, factors): 1, 16, 64 and 256 jobs of digits, 16 of the CSV
GRIDS = {
    "digits-1": (DIGITS, [1], ""),
    "digits-16": (DIGITS, [1, 2, 3, 4], LR),
    "digits-64": (DIGITS, [1, 2, 3, 4], LR + "\n" + OPT),
    "digits-256": (DIGITS, [1, 2, 3, 4], LR + "\n" + OPT + "\n" + L2),
    "csv20k-16": (CSV, [1, 2, 3, 4], LR),
    # an adaptive recipe: 16 configurations raced over 6 seeds, its rounds trained as they come
    "digits-race": (DIGITS + "[adaptive]\nfirst_seeds = 3\n", [1, 2, 3, 4, 5, 6], LR + "\n" + OPT),
}


def write_csv(path: Path, rows: int = 20_000, features: int = 50, seed: int = 0) -> None:
    """A synthetic three-class table: features from a seeded normal generator, the label from
    a fixed random linear rule with noise. Invented for this benchmark."""
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(rows, features)).astype(np.float32)
    score = X @ rng.normal(size=(features, 3)) + rng.normal(scale=2.0, size=(rows, 3))
    y = score.argmax(axis=1)
    header = ",".join([f"f{i}" for i in range(features)] + ["label"])
    body = np.column_stack([X, y]).astype(object)
    with path.open("w") as f:
        f.write(f"# synthetic benchmark data written by bench/wall.py (seed {seed}); not real measurements\n")
        f.write(header + "\n")
        for row in body:
            f.write(",".join(f"{v:.5f}" for v in row[:-1]) + f",{int(row[-1])}\n")


def recipe_file(folder: Path, name: str, seeds: list[int] | None = None) -> Path:
    template, default_seeds, factors = GRIDS[name]
    path = folder / f"{name}-{len(seeds or default_seeds)}.toml"
    text = template.format(name=name, seeds=seeds or default_seeds, factors=factors)
    path.write_text(textwrap.dedent(text))
    return path


def timed(*args: str, tree: Path = ROOT) -> tuple[float, str]:
    """(wall seconds, stderr) of one CLI command in a fresh interpreter, of this checkout of
    the project or another (``--compare``)."""
    env = {**ENV, "PYTHONPATH": str(tree) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    start = time.perf_counter()
    proc = subprocess.run(
        [sys.executable, "-m", "runner", *args], env=env, capture_output=True, text=True, cwd=str(tree)
    )
    wall = time.perf_counter() - start
    if proc.returncode != 0:
        raise SystemExit(f"recipe {' '.join(args)} failed:\n{proc.stderr[-2000:]}")
    return wall, proc.stderr


def stored(store: Path) -> tuple[int, float]:
    """(jobs stored, their summed training seconds)."""
    with sqlite3.connect(store) as c:
        n, seconds = c.execute("SELECT count(*), coalesce(sum(duration), 0) FROM jobs").fetchone()
    return n, seconds


def how(stderr: str) -> str:
    """The run's own line saying how it trains (workers, groups), if it printed one."""
    lines = [ln for ln in stderr.splitlines() if ln.startswith("training ")]
    return lines[0] if lines else "-"


def run_grid(folder: Path, name: str, rounds: int, trees: list[Path]) -> list[dict]:
    """One grid's figures for each tree; each command alternates between the trees (and
    between default options and --workers 1) round by round."""
    recipe = recipe_file(folder, name)
    best = [{"default": float("inf"), "w1": float("inf"), "noop": float("inf"), "board": float("inf")} for _ in trees]
    trained = [{"default": [], "w1": []} for _ in trees]
    notes = ["-"] * len(trees)
    order = list(enumerate(trees))
    for r in range(rounds):
        for mode in ("default", "w1") if r % 2 == 0 else ("w1", "default"):
            for t, tree in order if r % 2 == 0 else order[::-1]:
                store = folder / f"{name}-{t}-{mode}-{r}.sqlite"
                extra = ["--workers", "1"] if mode == "w1" else []
                wall, err = timed("run", str(recipe), "--store", str(store), *extra, tree=tree)
                best[t][mode] = min(best[t][mode], wall)
                trained[t][mode].append(stored(store)[1])
                if mode == "default":
                    notes[t] = how(err)
    for _ in range(2):
        for t, tree in order:
            store = str(folder / f"{name}-{t}-default-0.sqlite")
            best[t]["noop"] = min(best[t]["noop"], timed("run", str(recipe), "--store", store, tree=tree)[0])
            best[t]["board"] = min(best[t]["board"], timed("board", str(recipe), "--store", store, tree=tree)[0])
    jobs = stored(folder / f"{name}-0-default-0.sqlite")[0]
    return [
        {**b, "jobs": jobs, "train": min(tr["default"]), "train_w1": min(tr["w1"]), "note": note}
        for b, tr, note in zip(best, trained, notes)
    ]


def extension(folder: Path, rounds: int, tree: Path = ROOT) -> dict:
    """Extend a finished 3-seed grid (16 configurations) to 5 seeds, against the 2 new
    seeds alone; alternating, least of each."""
    three, five, two = (recipe_file(folder, "digits-64", s) for s in ([1, 2, 3], [1, 2, 3, 4, 5], [4, 5]))
    best = {"extend": float("inf"), "alone": float("inf")}
    trained = {"extend": float("inf"), "alone": float("inf")}
    for r in range(rounds):
        store = folder / f"extend-{tree.name}-{r}.sqlite"
        timed("run", str(three), "--store", str(store), "-q", tree=tree)
        before = stored(store)
        for mode in ("extend", "alone") if r % 2 == 0 else ("alone", "extend"):
            if mode == "extend":
                wall, _ = timed("run", str(five), "--store", str(store), tree=tree)
                n, seconds = stored(store)
                n, seconds = n - before[0], seconds - before[1]
            else:
                target = folder / f"alone-{tree.name}-{r}.sqlite"
                wall, _ = timed("run", str(two), "--store", str(target), tree=tree)
                n, seconds = stored(target)
            best[mode] = min(best[mode], wall)
            trained[mode] = min(trained[mode], seconds)
    return {"new_jobs": n, **best, "train_extend": trained["extend"], "train_alone": trained["alone"]}


def import_floor(rounds: int = 3) -> float:
    """Least wall time of a fresh interpreter that imports torch and exits at once (without
    the interpreter's teardown, as the tool's commands end): the part of any training run's
    fixed cost that no change to the tool can remove."""
    best = float("inf")
    for _ in range(rounds):
        start = time.perf_counter()
        subprocess.run([sys.executable, "-c", "import os, torch; os._exit(0)"], check=True)
        best = min(best, time.perf_counter() - start)
    return best


def verdict(ok: bool) -> str:
    return "ok" if ok else "MISSED"


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--rounds", type=int, default=2)
    parser.add_argument("--only", nargs="*", default=None, help="grid names (default: all), or 'extension'")
    parser.add_argument("--compare", type=Path, default=None, help="another checkout, timed alternately (paired)")
    args = parser.parse_args()
    trees = [ROOT] + ([args.compare.resolve()] if args.compare else [])
    cores = len(os.sched_getaffinity(0))
    cpuinfo = Path("/proc/cpuinfo").read_text().splitlines()
    cpu = next((ln.split(":", 1)[1].strip() for ln in cpuinfo if ln.startswith("model name")), "?")
    print(f"# bench/wall.py, {time.strftime('%Y-%m-%d %H:%M')}, {cpu}, {cores} cores, load {os.getloadavg()[0]:.2f}")
    print(f"# least of {args.rounds} alternating rounds per figure; times in seconds")
    floor = import_floor()
    print(f"# floor: a fresh interpreter that imports torch and exits at once takes {floor:.2f} s (least of 3); every"
          " run that trains pays it, so 'tool' below is wall - training - floor: what the tool adds")  # fmt: skip
    names = [n for n in GRIDS if args.only is None or n in args.only]
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        if any(n.startswith("csv") for n in names):
            write_csv(folder / "wall.csv")
        header = (
            f"{'grid':<11} {'jobs':>4} {'default':>8} {'--w 1':>7} {'train':>6} {'wall/tr':>7} "
            f"{'wall-tr':>7} {'tool':>5} {'def/w1':>6} {'no-op':>6} {'board':>6}  goals; how the default trains"
        )
        print(header)
        missed = 0
        for name in names:
            for t, r in enumerate(run_grid(folder, name, args.rounds, trees)):
                ratio, extra = r["default"] / r["train"], r["default"] - r["train"]
                goals = [
                    extra <= 2.0 and (r["jobs"] < 64 or ratio <= 1.5),
                    r["default"] <= r["w1"] * 1.05,  # within 5%: two timings of one thing on a shared machine
                    r["noop"] < 1.5 and r["board"] < 1.5,
                ]
                missed += goals.count(False) if t == 0 else 0
                label = name if t == 0 else "  (other)"
                print(
                    f"{label:<11} {r['jobs']:>4} {r['default']:>8.2f} {r['w1']:>7.2f} {r['train']:>6.2f} "
                    f"{ratio:>7.2f} {extra:>7.2f} {extra - floor:>5.2f} {r['default'] / r['w1']:>6.2f} "
                    f"{r['noop']:>6.2f} {r['board']:>6.2f}  "
                    f"wall {verdict(goals[0])}, default {verdict(goals[1])}, read {verdict(goals[2])}; {r['note']}"
                )
                sys.stdout.flush()
        if args.only is None or "extension" in args.only:
            for t, tree in enumerate(trees):
                e = extension(folder, args.rounds, tree)
                ok = e["extend"] <= 1.2 * e["alone"]
                missed += not ok if t == 0 else 0
                print(
                    f"{'' if t == 0 else '(other) '}extension 3 -> 5 seeds (16 configurations, {e['new_jobs']} new "
                    f"jobs): {e['extend']:.2f} s, the 2 seeds alone {e['alone']:.2f} s, ratio "
                    f"{e['extend'] / e['alone']:.2f} ({verdict(ok)}); stored training of the new jobs "
                    f"{e['train_extend']:.2f} s vs alone {e['train_alone']:.2f} s"
                )
        print(f"{missed} goal(s) missed (this tree)")


if __name__ == "__main__":
    main()
