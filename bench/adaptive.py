"""Simulation benchmark: error rates and savings of the adaptive seeding race, through its functions.

The race (runner/evidence/race.py: racing after Maron & Moore 1994 and F-Race, Birattari et al.
2002, with Hsu 1996's constrained comparisons with the best at each look, the level split over
the planned looks by Bonferroni) is driven here exactly as the tool drives it: a RacePlan, then
advance(plan, values, finished, protocol, stored_looks) round by round, finishing only the jobs
RaceState.wanted asks for. Simulated grids of 4, 8 and 16 configurations, seeds lists of 5 and
10 seeds, first_seeds 3, alpha 0.05, for
  - a continuous metric: y[i, s] = shift_i + seed_s + e[i, s], e ~ N(0, 1) (the per-seed sd),
    seed effects sd 2 shared by every configuration (bench/verdicts.py's `continuous`), raced
    with the fixed-split protocol;
  - the "resample" protocol (each seed redraws the split, n_val/n_train = 1/4): as above plus a
    component of variance (1/4) sigma^2 shared by the seeds of one configuration through the
    overlap of their training sets (Nadeau & Bengio 2003's model, as bench/verdicts.py's
    `resampled`), raced with Resampling.resample(n_val=1, n_train=4).
Each simulated grid's values are drawn in full, per (configuration, seed), from a stream keyed by
(--seed, k, seeds, repetition) before the race starts; the race only reveals the ones it asks
for, so no value depends on the order jobs are asked for. The three cases of one repetition
share these draws and differ only in shift_0 (common random numbers).
It prints, per setting:
  - equal: all configurations equal; how often the race drops any configuration (every drop
    wrongly denies a truly best one; goal <= 0.05);
  - 1 sd / 2 sd: configuration 0 better by 1 or 2 per-seed sd, the others equal; how often it
    is dropped at a look or left out of the last look's kept set (the race's stated guarantee;
    goal <= 0.05), how often the race ends with it alone, and the jobs used as a share of the
    full grid's (k x seeds);
  with one-sided 95% Clopper-Pearson upper bounds on the error rates, then one line per goal.
Then the same race on two real recipes of bundled data (REAL below: digits and breast_cancer,
8 configurations x 10 seeds each, the default validation protocol): the full grid and the
adaptive recipe each run through `recipe run` on fresh stores (share of the full grid's jobs
the race trained; is its winner in the full board's possibly-best set?), then the race
replayed through advance() on the full grid's stored values over REORDERINGS random orders
of the seeds list (the seeds are exchangeable, so each order is a race the tool could have
run), for how often that holds and the spread of the share.

Run: python bench/adaptive.py [--quick] [--seed N] [--real-only | --mixed-only]
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import math
import os
import subprocess
import sys
import tempfile
import textwrap
import time
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np
from scipy.stats import beta

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from runner.evidence.protocols import FIXED, Resampling
from runner.evidence.race import ONE_LEFT, RacePlan, advance
from runner.evidence.selection import possibly_best

ROOT = Path(__file__).resolve().parents[1]
CONFIGS = (4, 8, 16)
SEED_LISTS = (5, 10)
FIRST_SEEDS = 3
ALPHA = 0.05
OVERLAP = 0.25  # n_val / n_train of the resample protocol
PROTOCOLS = {"fixed": FIXED, "resample": Resampling.resample(n_val=1, n_train=4)}
CASES = {"equal": 0.0, "1 sd": 1.0, "2 sd": 2.0}  # shift of configuration 0, in per-seed sd
CHUNK = 50  # races per task (for load balance; results do not depend on it)


def grid(base_seed, k, n, rep, overlap):
    """Every (configuration, seed) value of one simulated grid before the shift: seed effects
    (sd 2) shared by all configurations, N(0, 1) noise, and for a redrawn split a component of
    variance ``overlap`` shared by the seeds of each configuration."""
    rng = np.random.default_rng([base_seed, k, n, rep])
    y = rng.normal(0, 2.0, n)[None, :] + rng.normal(0, 1.0, (k, n))
    if overlap:
        y += rng.normal(0, math.sqrt(overlap), k)[:, None]
    return y


def race(plan, table, protocol, keep=None):
    """Run one race through advance(), finishing exactly the jobs each state asks for.
    Returns the final RaceState and the number of jobs trained (``keep``: a dict that gets
    the values the race saw)."""
    column = {s: j for j, s in enumerate(plan.seeds)}
    values = {c: {} for c in plan.configs}
    finished = {c: set() for c in plan.configs}
    looks, trained = (), 0
    while True:
        state = advance(plan, values, finished, protocol, looks)
        if state.finished:
            assert trained == state.jobs_used(), (trained, state.jobs_used())
            if keep is not None:
                keep.update(values)
            return state, trained
        for c, seeds in state.wanted.items():
            row = plan.configs.index(c)
            for s in seeds:
                values[c][(s, None)] = float(table[row, column[s]])
                finished[c].add((s, None))
                trained += 1
        looks = state.looks


def _task(args):
    """Counts over repetitions [start, stop) of one setting: per case (errors, lone wins, jobs)."""
    name, k, n, start, stop, base_seed = args
    protocol = PROTOCOLS[name]
    plan = RacePlan(tuple(f"c{i}" for i in range(k)), tuple(range(1, n + 1)), FIRST_SEEDS, "val.metric", "max",
                    ALPHA)  # fmt: skip
    counts = {case: [0, 0, 0] for case in CASES}
    for rep in range(start, stop):
        base = grid(base_seed, k, n, rep, OVERLAP if protocol.kind == "resample" else 0.0)
        for case, shift in CASES.items():
            table = base.copy()
            table[0] += shift
            state, jobs = race(plan, table, protocol)
            if shift == 0:
                wrong = any(not d.kept for lk in state.looks for d in lk.decisions)
            else:
                wrong = state.dropped_at("c0") is not None or "c0" not in state.looks[-1].kept
            alone = state.stop == ONE_LEFT and state.alive == ("c0",)
            tally = counts[case]
            tally[0] += wrong
            tally[1] += alone
            tally[2] += jobs
    return counts


# The benchmark grid: configuration 0 best, two close behind it (0.5 sd), the rest
# clearly worse (3 sd); seeds lists of 10 and 20, the first 3 in round 1. The close ones are
# seldom told apart from the best, so they mostly run to the end of the list, and the share
# of the full grid a race trains falls as the list grows; 'least' below is the share if the
# clear losers went after round 1 and the close ones ran to the end.
MIXED_K, MIXED_N, CLOSE, WORSE = (8, 16), (10, 20), -0.5, -3.0


def _mixed_task(args):
    """(jobs trained, races whose winner the full grid's possibly-best set holds) over
    repetitions [start, stop): the winner is the kept configuration with the best mean over
    its seeds; the full grid's set is the board's (selection.possibly_best on every seed)."""
    name, k, n, start, stop, base_seed = args
    protocol = PROTOCOLS[name]
    plan = RacePlan(tuple(f"c{i}" for i in range(k)), tuple(range(1, n + 1)), FIRST_SEEDS, "val.metric", "max",
                    ALPHA)  # fmt: skip
    shift = np.array([0.0, CLOSE, CLOSE] + [WORSE] * (k - 3))
    jobs = same = 0
    for rep in range(start, stop):
        table = grid(base_seed + 1, k, n, rep, OVERLAP if protocol.kind == "resample" else 0.0) + shift[:, None]
        seen: dict = {}
        state, trained = race(plan, table, protocol, seen)
        winner = max(state.alive, key=lambda c: np.mean(list(seen[c].values())))
        full = possibly_best(table, "max", ALPHA, protocol, family=k)
        jobs += trained
        same += bool(full.possibly_best[plan.configs.index(winner)])
    return jobs, same


def upper_bound(errors, reps, level=0.95):
    """One-sided Clopper-Pearson upper bound on a binomial rate."""
    return 1.0 if errors >= reps else float(beta.ppf(level, errors + 1, reps - errors))


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="200 races per setting and case (about a minute)")
    parser.add_argument("--seed", type=int, default=20240601)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--real-only", action="store_true", help="only the two real recipes")
    parser.add_argument("--mixed-only", action="store_true", help="only the grids with clear losers")
    args = parser.parse_args(argv)
    reps = 200 if args.quick else 2000
    command = " ".join(["python", "bench/adaptive.py", *(sys.argv[1:] if argv is None else argv)])
    cpus = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()
    print(f"# bench/adaptive.py, {time.strftime('%Y-%m-%d %H:%M')}, {cpus} CPUs usable, {args.workers} workers")
    print(f"# command: {command}")
    start = time.perf_counter()
    if args.real_only or args.mixed_only:
        missed = _real(args) if args.real_only else _mixed(args, reps)
        print(f"\n{missed} goal(s) missed; {time.perf_counter() - start:.0f} s")
        return 1 if missed else 0
    settings = [(name, k, n) for name in PROTOCOLS for k in CONFIGS for n in SEED_LISTS]
    tasks = [(*s, a, min(a + CHUNK, reps), args.seed) for s in settings for a in range(0, reps, CHUNK)]
    totals = {s: {case: np.zeros(3, dtype=int) for case in CASES} for s in settings}
    with ProcessPoolExecutor(args.workers) as pool:
        for task, counts in zip(tasks, pool.map(_task, tasks)):
            for case, tally in counts.items():
                totals[task[:3]][case] += tally

    print(f"\nRace: {reps} simulated races per setting and case; alpha {ALPHA}; first_seeds {FIRST_SEEDS};")
    print("each look at alpha / L (L = seeds - first_seeds + 1 planned looks, Bonferroni)")
    print("  equal: drop = some configuration dropped with all equal (goal <= 0.05)")
    print("  1 sd, 2 sd: lost = configuration 0 (truly best) dropped or not kept at the last look (goal <= 0.05);")
    print("    alone = the race ended with configuration 0 the only one left")
    print("  up95 = one-sided 95% Clopper-Pearson upper bound; jobs = mean jobs used / full grid (k x seeds)\n")
    header = (
        f"{'protocol':<9} {'k':>3} {'n':>3} {'L':>2} | {'drop':>6} {'up95':>6} {'jobs':>5} | "
        f"{'lost':>6} {'up95':>6} {'alone':>6} {'jobs':>5} | {'lost':>6} {'up95':>6} {'alone':>6} {'jobs':>5}"
    )
    print(f"{'':<20} | {'equal':^19} | {'0 best by 1 sd':^26} | {'0 best by 2 sd':^26}".rstrip())
    print(header)
    print("-" * len(header))
    rates = {case: [] for case in CASES}  # (setting, rate, upper bound) for the goal lines
    for name, k, n in settings:
        cells = []
        for case in CASES:
            wrong, alone, jobs = totals[(name, k, n)][case]
            rate, up = wrong / reps, upper_bound(wrong, reps)
            rates[case].append((f"{name} k={k} n={n}", rate, up))
            share = jobs / (reps * k * n)
            if case == "equal":
                cells.append(f"{rate:>6.3f} {up:>6.3f} {share:>5.2f}")
            else:
                cells.append(f"{rate:>6.3f} {up:>6.3f} {alone / reps:>6.3f} {share:>5.2f}")
        print(f"{name:<9} {k:>3} {n:>3} {n - FIRST_SEEDS + 1:>2} | " + " | ".join(cells))

    print(f"\nGoals (rate <= {ALPHA}; 'shown' when the 95% upper bound is also <= {ALPHA}):")
    goals = {
        "equal": "all equal, some configuration dropped",
        "1 sd": "configuration 0 best by 1 sd, lost",
        "2 sd": "configuration 0 best by 2 sd, lost",
    }
    missed = 0
    for case, text in goals.items():
        above = [(s, r, u) for s, r, u in rates[case] if r > ALPHA]
        shown = sum(u <= ALPHA for _, _, u in rates[case])
        worst = max(rates[case], key=lambda t: t[1])
        missed += len(above)
        total = len(rates[case])
        line = f"  {text}: met in {total - len(above)} of {total} settings, shown in {shown}"
        line += f"; highest {worst[1]:.3f} (up95 {worst[2]:.3f}) at {worst[0]}"
        if above:
            line += "; above the goal: " + ", ".join(f"{s} {r:.3f}" for s, r, _ in above)
        print(line)
    missed += _mixed(args, reps)
    missed += _real(args)
    print(f"\n{missed} goal(s) missed; {time.perf_counter() - start:.0f} s with {args.workers} workers")
    return 1 if missed else 0


def _mixed(args, reps) -> int:
    """The issue's benchmark: jobs used and decisions kept on grids with clear losers."""
    settings = [(name, k, n) for n in MIXED_N for name in PROTOCOLS for k in MIXED_K]
    tasks = [(*s, a, min(a + CHUNK, reps), args.seed) for s in settings for a in range(0, reps, CHUNK)]
    totals = {s: np.zeros(2, dtype=int) for s in settings}
    with ProcessPoolExecutor(args.workers) as pool:
        for task, counts in zip(tasks, pool.map(_mixed_task, tasks)):
            totals[task[:3]] += counts
    print(f"\nGrids with clear losers: configuration 0 best, two {-CLOSE:g} sd behind, the rest {-WORSE:g} sd behind;")
    print(f"first_seeds {FIRST_SEEDS}; goal: jobs <= 0.50 of the full grid and the race's winner in the full grid's")
    print("possibly-best set in >= 95% of grids; 'least' = the share if the clear losers went after round 1")
    print("and the close ones ran to the end")
    missed = 0
    for (name, k, n), (jobs, same) in totals.items():
        share, agree = jobs / (reps * k * n), same / reps
        least = (k * FIRST_SEEDS + 3 * (n - FIRST_SEEDS)) / (k * n)
        ok = share <= 0.5 and agree >= 0.95
        missed += not ok
        verdict = "met" if ok else "NOT met"
        print(f"  {name:<9} k={k:>2} n={n:>2}: jobs {share:.2f} of the full grid (least {least:.2f}), "
              f"same decision {agree:.3f} ({verdict})")  # fmt: skip
    return missed


# Two real recipes of bundled data, 8 configurations x 10 seeds each (the default validation
# protocol: each seed redraws the split). The grids are of the kind a user starts from: some
# levels far from useful, some close.
REAL = {
    "digits, optimizer x learning rate": """
        name = "bench-race-digits"
        seeds = [1, 2, 3, 4, 5, 6, 7, 8, 9, 10]
        [data]
        source = "digits"
        [model]
        hidden = [32]
        [train]
        epochs = 6
        batch_size = 64
        [factors.optimizer]
        labels = ["sgd 0.01", "sgd 0.1", "momentum 0.01", "momentum 0.1", "adam 0.0001", "adam 0.001",
                  "adam 0.01", "rmsprop 0.001"]
        "train.optimizer" = ["sgd", "sgd", "momentum", "momentum", "adam", "adam", "adam", "rmsprop"]
        "train.lr" = [0.01, 0.1, 0.01, 0.1, 0.0001, 0.001, 0.01, 0.001]
    """,
    "breast_cancer, L2 x dropout": """
        name = "bench-race-cancer"
        seeds = [1, 2, 3, 4, 5, 6, 7, 8, 9, 10]
        [data]
        source = "breast_cancer"
        [model]
        hidden = [32, 32]
        [train]
        optimizer = "adam"
        lr = 0.001
        epochs = 30
        batch_size = 32
        [factors]
        "train.l2" = [0.0, 0.0001, 0.01, 0.1]
        "model.dropout" = [0.0, 0.5]
    """,
}
REORDERINGS = 200


def _recipe_run(recipe: Path, store: Path) -> dict:
    """`recipe run` then `recipe board --format json` on ``store``, as a user runs them."""
    env = {**os.environ, "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    for argv in (["run", str(recipe), "--store", str(store), "-q"], ["board", str(recipe), "--store", str(store),
                                                                     "--format", "json"]):  # fmt: skip
        done = subprocess.run([sys.executable, "-m", "runner", *argv], capture_output=True, text=True, env=env)
        if done.returncode != 0:
            raise SystemExit(f"recipe {' '.join(argv)} failed: {done.stderr.strip()}")
    return json.loads(done.stdout)


def _winner(doc: dict) -> str:
    return doc["rows"][0]["config_id"]


def _replay(full_recipe: Path, full_store: Path, raced_recipe: Path, accepted: set, rng) -> tuple[list, list]:
    """The race replayed through advance() on the full grid's stored values, once per random
    order of the seeds: (shares of the full grid's jobs, winner accepted?) per order."""
    from runner.evidence.leaderboard import protocol_of
    from runner.evidence.race_board import _inputs, race_plan
    from runner.recipe.grid import expand
    from runner.recipe.loader import load_recipe
    from runner.store.database import Store

    grid = expand(load_recipe(full_recipe))
    plan = race_plan(expand(load_recipe(raced_recipe)))
    with Store(full_store, create=False) as store:
        protocol = protocol_of(grid, store.jobs({j.key for j in grid}))
        values, finished = _inputs(grid, store, plan.metric)
    shares, agree = [], []
    for _ in range(REORDERINGS):
        order = dataclasses.replace(plan, seeds=tuple(int(s) for s in rng.permutation(plan.seeds)))
        seen = {c: {} for c in order.configs}
        done = {c: set() for c in order.configs}
        looks, trained = (), 0
        while not (state := advance(order, seen, done, protocol, looks)).finished:
            for c, seeds in state.wanted.items():
                for s in seeds:
                    done[c].add((s, None))
                    trained += 1
                    if (s, None) in values[c]:
                        seen[c][(s, None)] = values[c][(s, None)]
            looks = state.looks
        assert trained == state.jobs_used() and all(finished[c] >= done[c] for c in done)
        winner = max(state.alive, key=lambda c: np.mean(list(seen[c].values())) * (1 if plan.goal == "max" else -1))
        shares.append(trained / plan.full_jobs)
        agree.append(winner in accepted)
    return shares, agree


def _real(args) -> int:
    """The race on two real recipes (REAL): through the CLI once, then replayed over seed orders."""
    print(f"\nReal recipes (bundled data; 8 configurations x 10 seeds; first_seeds {FIRST_SEEDS}; default validation):")
    print("  cli: the adaptive recipe through `recipe run` on a fresh store; replay: the race over")
    print(f"  {REORDERINGS} random orders of the seeds on the full grid's stored values")
    rng = np.random.default_rng(args.seed)
    missed = 0
    with tempfile.TemporaryDirectory(prefix="bench-adaptive-") as tmp:
        for title, text in REAL.items():
            full = Path(tmp) / f"{len(title)}-full.toml"
            raced = Path(tmp) / f"{len(title)}-raced.toml"
            body = textwrap.dedent(text)
            full.write_text(body)
            raced.write_text(body + f"[adaptive]\nfirst_seeds = {FIRST_SEEDS}\n")
            full_doc = _recipe_run(full, full.with_suffix(".sqlite"))
            raced_doc = _recipe_run(raced, raced.with_suffix(".sqlite"))
            accepted = {r["config_id"] for r in full_doc["rows"] if r["possibly_best"]}
            labels = {r["config_id"]: ", ".join(str(v) for v in r["labels"].values()) for r in full_doc["rows"]}
            share = raced_doc["jobs"]["done"] / full_doc["jobs"]["total"]
            ok = _winner(raced_doc) in accepted
            print(f"  {title}: full grid's possibly-best set {sorted(labels[c] for c in accepted)}")
            print(f"    cli:    {raced_doc['jobs']['done']} of {full_doc['jobs']['total']} jobs ({share:.2f}), winner "
                  f"{labels[_winner(raced_doc)]!r} {'in' if ok else 'NOT in'} that set")  # fmt: skip
            shares, agree = _replay(full, full.with_suffix(".sqlite"), raced, accepted, rng)
            q = np.quantile(shares, [0.0, 0.5, 1.0])
            met = np.mean(shares) <= 0.5 and np.mean(agree) >= 0.95
            missed += not met
            print(f"    replay: jobs {np.mean(shares):.2f} of the full grid (min {q[0]:.2f}, median {q[1]:.2f}, "
                  f"max {q[2]:.2f}), winner in the set in {np.mean(agree):.3f} of orders "
                  f"({'met' if met else 'NOT met'})")  # fmt: skip
    return missed


if __name__ == "__main__":
    sys.exit(main())
