"""Simulation benchmark: error rates of the board's verdicts, through the functions it calls.

Simulated grids of 4, 8 and 16 configurations over 2, 3, 5 and 10 seeds, for
  - a continuous metric: y[i, s] = mu_i + seed_s + e[i, s], e ~ N(0, 1), seed effects sd 2;
  - accuracy on a fixed validation set of 100 or 500 rows: the count of correct rows is
    Binomial(rows, p[i, s]) with p[i, s] = 0.9 + delta_i + seed_s + g[i, s], seed effects
    shared by every configuration (sd 0.01, so seeds act as blocks) and a
    configuration-by-seed term g (sd 0.005); 100 rows gives a coarse metric (steps of 0.01);
  - the "resample" protocol (each seed redraws the split, n_val/n_train = 1/4): the seeds
    of one configuration share a component of variance (1/4) sigma^2 through the overlap of
    their training sets (Nadeau & Bengio 2003's model), analysed once as if the split were
    fixed and once with their corrected variance.
It prints, per setting:
  - equal: how often some configuration is put outside the possibly-best set when all are
    equal (goal <= 0.05), beside the rate of the rule the board used before (paired t of
    each row against the observed best, Holm-adjusted, from runner.evidence.stats);
  - cover: with configuration 0 better by one per-seed sd, how often the possibly-best
    set contains it (goal >= 0.95) and the set's mean size;
  both for the default studentized-range constant (the goals apply to it) and for Hsu's
  Dunnett constant, whose promise (a truly best row, not every tied one) is weaker;
  - gate: with 16 configurations run twice on the same seeds (same data and split; the second
    run draws new noise around the same seed-by-configuration values), how often any
    configuration is called changed when none changed (goal <= 0.05), and how often one
    configuration that changed by 2 sd of its paired differences is called changed.

Run: python bench/verdicts.py [--quick] [--seed N]
"""

from __future__ import annotations

import argparse
import math
import sys
import time
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from runner.evidence import stats as old_stats
from runner.evidence.gate import compare_runs
from runner.evidence.protocols import FIXED, Resampling
from runner.evidence.selection import possibly_best
from runner.evidence.verdicts import assess

CONFIGS = (4, 8, 16)
SEEDS = (2, 3, 5, 10)
ALPHA = 0.05
OVERLAP = 0.25  # n_val / n_train of the resample protocol
RESAMPLE = Resampling.resample(n_val=1, n_train=4)


def continuous(rng, k, n, shift):
    """Values and the per-seed sd (1) of a continuous metric; shift[i] in sd units."""
    return shift[:, None] + rng.normal(0, 2.0, n)[None, :] + rng.normal(0, 1.0, (k, n)), 1.0


def _acc_sd(rows):
    return math.sqrt(0.005**2 + 0.9 * 0.1 / rows)


def accuracy(rows):
    def draw(rng, k, n, shift, g=None):
        sd = _acc_sd(rows)
        g = rng.normal(0, 0.005, (k, n)) if g is None else g
        p = np.clip(0.9 + shift[:, None] * sd + rng.normal(0, 0.01, n)[None, :] + g, 0, 1)
        return rng.binomial(rows, p) / rows, sd

    return draw


def resampled(rng, k, n, shift):
    """Seeds of one configuration share a component of variance OVERLAP (training-set overlap)."""
    shared = rng.normal(0, math.sqrt(OVERLAP), k)[:, None]
    return shift[:, None] + shared + rng.normal(0, 2.0, n)[None, :] + rng.normal(0, 1.0, (k, n)), 1.0


def _old_rule_flags(y):
    """The previous board rule: paired t of each row against the observed best, Holm."""
    order = np.argsort(-y.mean(axis=1))
    best = y[order[0]]
    p = [old_stats.paired(y[i], best)["p_value"] for i in order[1:]]
    return any(q < ALPHA for q in old_stats.holm(p))


def _kept(y, protocol, constant):
    """Which rows are possibly best. The default constant goes through the board's own wiring
    (verdicts.assess, as `recipe board` calls it); Hsu's constant through selection directly."""
    if constant != "range":
        return possibly_best(y, "max", ALPHA, protocol, constant=constant).possibly_best
    values = {str(i): {(s, None): float(v) for s, v in enumerate(row)} for i, row in enumerate(y)}
    found = assess(values, dict.fromkeys(values, True), "max", protocol, ALPHA)
    return tuple(found.verdicts[str(i)].kind == "possibly_best" for i in range(len(y)))


def selection_rates(draw, protocol, k, n, reps, rng, old_rule):
    """Rates for both constants: {constant: (equal, cover, size)} and the old rule's rate."""
    out = {}
    equal, better = np.zeros(k), np.zeros(k)
    better[0] = 1.0
    counts = {c: [0, 0, 0] for c in ("range", "dunnett")}
    old_wrong = 0
    for _ in range(reps):
        y, _ = draw(rng, k, n, equal)
        for c, tally in counts.items():
            tally[0] += not all(_kept(y, protocol, c))
        if old_rule:
            old_wrong += _old_rule_flags(y)
        y, _ = draw(rng, k, n, better)
        for c, tally in counts.items():
            kept = _kept(y, protocol, c)
            tally[1] += kept[0]
            tally[2] += sum(kept)
    for c, (wrong, covered, size) in counts.items():
        out[c] = (wrong / reps, covered / reps, size / reps)
    return out, (old_wrong / reps if old_rule else None)


def gate_rates(rows, n, reps, rng, configs=16, protocol=FIXED):
    """False alarms with nothing changed and power for one configuration changed by 2 sd of
    its paired differences (continuous metric when rows is None, else accuracy)."""
    alarms = hits = 0
    for changed in (False, True):
        for _ in range(reps):
            if rows is None:
                base = rng.normal(0, 2.0, n)[None, :] + rng.normal(0, 1.0, (configs, n))
                old = base + rng.normal(0, 0.5, (configs, n))
                new = base + rng.normal(0, 0.5, (configs, n))
                if changed:
                    new[0] += 2 * 0.5 * math.sqrt(2)
            else:
                g = rng.normal(0, 0.005, (configs, n)) + rng.normal(0, 0.01, n)[None, :]
                p = np.clip(0.9 + g, 0, 1)
                old = rng.binomial(rows, p) / rows
                p_new = p.copy()
                if changed:
                    p_new[0] += 2 * math.sqrt(2 * 0.9 * 0.1 / rows)
                new = rng.binomial(rows, np.clip(p_new, 0, 1)) / rows
            out = compare_runs(list(old), list(new), "max", paired=True, alpha=ALPHA, protocol=protocol)
            flagged = [c.verdict in ("regressed", "improved") for c in out.changes]
            if changed:
                hits += flagged[0]
            else:
                alarms += any(flagged)
    return alarms / reps, hits / reps


SLACK = 3.3  # z for 5% over ~70 graded rates at once (Bonferroni)


def _grade(rate, goal, reps, upper):
    """PASS when the rate meets the goal; AT LEVEL when it misses by less than SLACK Monte
    Carlo standard errors (consistent with a rate exactly at the goal, as the studentized
    range constant's is by construction when all configurations are equal; with ~70 rates
    graded at once a 2-SE band would fail some row by chance); FAIL otherwise."""
    slack = SLACK * math.sqrt(goal * (1 - goal) / reps)
    met = rate <= goal if upper else rate >= goal
    near = rate <= goal + slack if upper else rate >= goal - slack
    return "PASS" if met else ("AT LEVEL" if near else "FAIL")


METRICS = {
    "continuous": (continuous, FIXED, True),
    "accuracy/100": (accuracy(100), FIXED, True),
    "accuracy/500": (accuracy(500), FIXED, True),
    "resample, naive": (resampled, FIXED, False),
    "resample, corrected": (resampled, RESAMPLE, False),
}
# (rows of accuracy or None for the continuous metric, the protocol the diff would use)
GATE_METRICS = {"continuous": (None, FIXED), "accuracy/100": (100, FIXED), "accuracy/500": (500, FIXED),
                "continuous, resample": (None, RESAMPLE)}  # fmt: skip


def _selection_task(args):
    name, k, n, reps, seq = args
    draw, protocol, old_rule = METRICS[name]
    return selection_rates(draw, protocol, k, n, reps, np.random.default_rng(seq), old_rule)


def _gate_task(args):
    name, n, reps, seq = args
    rows, protocol = GATE_METRICS[name]
    return gate_rates(rows, n, reps, np.random.default_rng(seq), protocol=protocol)


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer repetitions (well under a minute)")
    parser.add_argument("--seed", type=int, default=20240601)
    parser.add_argument("--workers", type=int, default=2)
    args = parser.parse_args(argv)
    reps = 200 if args.quick else 1000
    gate_reps = 100 if args.quick else 500
    streams = iter(np.random.SeedSequence(args.seed).spawn(1000))
    start = time.perf_counter()
    sel_tasks = [(name, k, n, reps, next(streams)) for name in METRICS for k in CONFIGS for n in SEEDS]
    gate_tasks = [(name, n, gate_reps, next(streams)) for name in GATE_METRICS for n in SEEDS]
    with ProcessPoolExecutor(args.workers) as pool:
        sel_results = list(pool.map(_selection_task, sel_tasks))
        gate_results = list(pool.map(_gate_task, gate_tasks))
    print(f"Selection: {reps} simulated grids per row and case; alpha {ALPHA}; seed {args.seed}")
    print("  equal = some configuration left out of the possibly-best set when all are equal (goal <= 0.05)")
    print("  cover = the configuration better by 1 sd is in the set (goal >= 0.95); size = mean set size")
    print("  range = default studentized-range constant (goals apply); dunnett = Hsu's constant (shown)")
    print("  old   = previous board rule (paired t vs observed best, Holm) marking some row worse")
    print(f"  Monte Carlo standard error of a rate near 0.05: {math.sqrt(0.05 * 0.95 / reps):.4f}; AT LEVEL = misses")
    print(f"  the goal by less than {SLACK} standard errors (the range constant's rate is exactly 0.05 for")
    print("  normal data when all configurations are equal; ~70 rates are graded at once)\n")
    header = (
        f"{'metric':<20} {'k':>3} {'n':>3} | {'equal':>6} {'cover':>6} {'size':>6} | "
        f"{'equal':>6} {'cover':>6} {'size':>6} | {'old':>6} | goals (range)"
    )
    print(f"{'':<28} | {'range (default)':^20} | {'dunnett (Hsu)':^20} |")
    print(header)
    print("-" * len(header))
    failures = 0
    for (name, k, n, _, _), (rates, old) in zip(sel_tasks, sel_results):
        (eq, cov, size), (deq, dcov, dsize) = rates["range"], rates["dunnett"]
        g_equal, g_cover = _grade(eq, ALPHA, reps, True), _grade(cov, 1 - ALPHA, reps, False)
        graded = name != "resample, naive"
        failures += graded * ((g_equal == "FAIL") + (g_cover == "FAIL"))
        marks = f"equal {g_equal}, cover {g_cover}"
        if not graded:
            marks += " (not graded: variance left uncorrected on purpose)"
        old_text = "-" if old is None else f"{old:.3f}"
        print(
            f"{name:<20} {k:>3} {n:>3} | {eq:>6.3f} {cov:>6.3f} {size:>6.2f} | "
            f"{deq:>6.3f} {dcov:>6.3f} {dsize:>6.2f} | {old_text:>6} | {marks}"
        )
    graded_rates = [
        rates["range"][0] for (name, *_), (rates, _) in zip(sel_tasks, sel_results) if name != "resample, naive"
    ]
    pooled = sum(graded_rates) / len(graded_rates)
    pooled_se = math.sqrt(pooled * (1 - pooled) / (reps * len(graded_rates)))
    print(
        f"\nrange constant, all graded rows pooled: equal {pooled:.4f} (standard error {pooled_se:.4f}; goal <= 0.05)"
    )
    print(f"\nGate: 16 configurations run twice on the same seeds, {gate_reps} pairs of runs per row")
    print("  alarm = any configuration called changed when none changed (goal <= 0.05)")
    print("  power = the one configuration changed by 2 sd of its paired differences is called changed\n")
    header = f"{'metric':<22} {'n':>3} {'alarm':>7} {'power':>7}  goal"
    print(header)
    print("-" * len(header))
    for (name, n, _, _), (alarm, power) in zip(gate_tasks, gate_results):
        grade = _grade(alarm, ALPHA, gate_reps, True)
        failures += grade == "FAIL"
        exact = GATE_METRICS[name][1].kind == "fixed"
        note = "" if n >= 10 or not exact else "  (16 x 2/2^n > 0.05: too few seeds for any verdict)"
        print(f"{name:<22} {n:>3} {alarm:>7.3f} {power:>7.3f}  alarm {grade}{note}")
    print(f"\n{failures} goal(s) missed (FAIL); {time.perf_counter() - start:.0f} s with {args.workers} workers")
    return 1 if failures else 0


if __name__ == "__main__":
    sys.exit(main())
