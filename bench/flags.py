"""How often each flag fires on healthy networks, through the functions the board uses.

Two sets of runs, each trained with `recipe run` into a temporary store:
  - the example recipes (recipes/*.toml) as they are: some of their configurations are
    unhealthy by design (depth_and_init's zeros, N(0, 1) and deep sigmoid rows; the
    quickstart's SGD at Adam's learning rate): they are listed by name so a reader can tell
    a true alarm from a false one;
  - healthy networks on every bundled data set (MLP 64-64, Adam at 1e-3, batch 32, five
    seeds): ReLU with He init, tanh with Glorot init, and ReLU with early stopping
    (patience 10, 200 epochs). The first two train for twice the budget B the flags are
    judged at; since a run's first B epochs do not depend on how many follow (constant
    rate, same seed), "still improving" is judged on the first B epochs of each val curve
    and checked against what the next B epochs did.
It prints, per flag, the share of jobs whose diagnostics meet its rule and the share of
configurations flagged (the board's rule: at least half the jobs, or the median), and for
"still improving" how much the val metric moved over the next B epochs, flagged or not.

Run: python bench/flags.py [--workers N] [--part all|examples|bundled] [--quick]
"""

from __future__ import annotations

import argparse
import statistics
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from runner.components.metrics import METRICS, Goal  # noqa: E402
from runner.evidence import flags as rules  # noqa: E402
from runner.evidence.document import Counts  # noqa: E402
from runner.recipe.loader import DiagnosticThresholds  # noqa: E402
from runner.store.database import Store  # noqa: E402
from runner.training import summaries  # noqa: E402
from runner.training.job import Status  # noqa: E402

TH = DiagnosticThresholds()
PER_JOB = {
    "vanishing_gradients": rules.vanishing,
    "exploding_gradients": rules.exploding,
    "still_improving": rules.still_improving,
    "stopped_early": rules.stopped_early,
    "unstable_loss": rules.unstable,
    "miscalibrated": rules.miscalibrated,
    "overfitting": lambda d, th: None if d.get("gap_scaled") is None else d["gap_scaled"] > th.gap_above,
    "dead_units": lambda d, th: None if d.get("dead_fraction") is None else d["dead_fraction"] > th.dead_above,
    "saturated_units": lambda d, th: (
        None if d.get("saturated_fraction") is None else d["saturated_fraction"] > th.saturated_above
    ),
}
BUDGETS = {"iris": 100, "wine": 100, "breast_cancer": 60, "digits": 30, "diabetes": 100, "moons": 60, "circles": 60}
HEALTHY = {
    "relu_he": ('"relu"', '"he_normal"', 0, None),
    "tanh_glorot": ('"tanh"', '"glorot_uniform"', 0, None),
    "relu_he_stop": ('"relu"', '"he_normal"', 10, 200),
}


def run(recipe: Path, store: Path, workers: int) -> None:
    cmd = [sys.executable, "-m", "runner", "run", str(recipe), "--store", str(store), "-q", "--workers", str(workers)]
    subprocess.run(cmd, check=True, stdout=subprocess.DEVNULL, cwd=ROOT, env={"PYTHONPATH": str(ROOT)})


def healthy_recipe(source: str, variant: str) -> str:
    activation, init, patience, budget = HEALTHY[variant]
    epochs = budget or 2 * BUDGETS[source]
    extra = "n_samples = 1000\nnoise = 0.2\n" if source in ("moons", "circles") else ""
    return f"""name = "healthy-{source}-{variant}"
seeds = [1, 2, 3, 4, 5]
[data]
source = "{source}"
{extra}[model]
hidden = [64, 64]
activation = {activation}
init = {init}
[train]
optimizer = "adam"
lr = 1e-3
batch_size = 32
epochs = {epochs}
patience = {patience}
"""


def judged_at(job, curves, budget: int) -> dict:
    """A job's diagnostics with the end-of-curve numbers recomputed on its first ``budget``
    epochs (as if it had been trained for that many)."""
    monitor = next(name[4:] for name in curves if name.startswith("val_") and name != "val_loss")
    val, train = curves[f"val_{monitor}"][:budget], curves["train_loss"][:budget]
    higher = METRICS[monitor].goal is Goal.MAX
    d = dict(job.diagnostics)
    d.update(summaries.tail_trend(val, higher, budget))
    d["loss_rise"] = summaries.loss_rise(train)
    return d


def config_flags(jobs: list) -> list:
    """The board's flags of one configuration from its (job, diagnostics) pairs."""
    done = [d for job, d in jobs if job.status is Status.DONE]
    counts = Counts(**{s.value: sum(j.status is s for j, _ in jobs) for s in Status})
    return rules.flags(done, counts, TH, init_diags=[d for _, d in jobs])


def tally(groups: dict[str, list[tuple[object, dict]]], out: dict) -> None:
    """Per-job rule hits and per-configuration flags into ``out`` (flag -> counters)."""
    for jobs in groups.values():
        done = [d for job, d in jobs if job.status is Status.DONE]
        fired = {f.code for f in config_flags(jobs)}
        for code, rule in PER_JOB.items():
            pool = [d for _, d in jobs] if code in ("vanishing_gradients", "exploding_gradients") else done
            verdicts = [v for v in (rule(d, TH) for d in pool) if v is not None]
            c = out.setdefault(code, [0, 0, 0, 0])
            c[0] += sum(verdicts)
            c[1] += len(verdicts)
            c[2] += code in fired
            c[3] += bool(verdicts)


def print_rates(title: str, out: dict) -> None:
    print(f"\n{title}")
    print(f"  {'flag':<22}{'jobs meeting the rule':>24}{'configurations flagged':>26}")
    for code, (hits, jobs, flagged, configs) in out.items():
        job_rate = f"{hits}/{jobs} ({hits / jobs:.1%})" if jobs else "-"
        conf_rate = f"{flagged}/{configs} ({flagged / configs:.1%})" if configs else "-"
        print(f"  {code:<22}{job_rate:>24}{conf_rate:>26}")


def examples(tmp: Path, workers: int) -> None:
    out: dict = {}
    print("Example recipes: configurations flagged (by design unhealthy ones included)")
    for recipe in sorted((ROOT / "recipes").glob("*.toml")):
        store = tmp / f"{recipe.stem}.sqlite"
        run(recipe, store, workers)
        with Store(store, create=False) as st:
            jobs = st.jobs()
        groups: dict = {}
        for job in jobs:
            groups.setdefault(job.config_id, []).append((job, job.diagnostics))
        for members in groups.values():
            fired = [f.text for f in config_flags(members)]
            label = ", ".join(str(v) for v in members[0][0].levels.values()) or "base"
            print(f"  {recipe.stem:<16}{label[:40]:<42}{', '.join(fired) or '-'}")
        tally(groups, out)
    print_rates("Example recipes, all configurations", out)


def bundled(tmp: Path, workers: int, sources: list[str]) -> None:
    out: dict = {}
    print("\nHealthy networks on the bundled data sets: configurations flagged")
    moved: dict[bool, list[float]] = {True: [], False: []}
    for source in sources:
        for variant in HEALTHY:
            path = tmp / f"{source}-{variant}.toml"
            path.write_text(healthy_recipe(source, variant))
            store = tmp / f"{source}-{variant}.sqlite"
            run(path, store, workers)
            with Store(store, create=False) as st:
                jobs = st.jobs()
                curves = st.curves([j.key for j in jobs])
            budget = BUDGETS[source] if HEALTHY[variant][3] is None else None
            groups: dict = {}
            for job in jobs:
                d = job.diagnostics if budget is None else judged_at(job, curves[job.key], budget)
                groups.setdefault(f"{source}/{variant}/{job.config_id}", []).append((job, d))
                if budget is not None and job.status is Status.DONE:
                    _record_move(curves[job.key], budget, d, moved)
            for name, members in groups.items():
                print(f"  {name.rsplit('/', 1)[0]:<32}{', '.join(f.text for f in config_flags(members)) or '-'}")
            tally(groups, out)
    print_rates("Healthy networks on the bundled data sets (still improving judged at budget B)", out)
    for flagged, gains in moved.items():
        if gains:
            state = "flagged" if flagged else "not flagged"
            print(
                f"  still improving {state} at B: {len(gains)} jobs; the val metric's move over the next B "
                f"epochs, as a share of its range over the first B: median {statistics.median(gains):+.3f}, "
                f"above +0.05 in {sum(g > 0.05 for g in gains) / len(gains):.0%}"
            )


def _record_move(curves, budget: int, d: dict, moved: dict) -> None:
    """The val metric's move over the next ``budget`` epochs, by the verdict at ``budget``."""
    monitor = next(name[4:] for name in curves if name.startswith("val_") and name != "val_loss")
    sign = 1.0 if METRICS[monitor].goal is Goal.MAX else -1.0
    v = [sign * x for x in curves[f"val_{monitor}"]]
    if len(v) < 2 * budget or max(v[:budget]) == min(v[:budget]):
        return
    verdict = rules.still_improving(d, TH)
    if verdict is not None:
        moved[verdict].append((v[-1] - v[budget - 1]) / (max(v[:budget]) - min(v[:budget])))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--part", choices=("all", "examples", "bundled"), default="all")
    parser.add_argument("--quick", action="store_true", help="bundled: iris, wine and diabetes only")
    args = parser.parse_args()
    sources = ["iris", "wine", "diabetes"] if args.quick else list(BUDGETS)
    with tempfile.TemporaryDirectory() as tmp:
        if args.part in ("all", "examples"):
            examples(Path(tmp), args.workers)
        if args.part in ("all", "bundled"):
            bundled(Path(tmp), args.workers, sources)


if __name__ == "__main__":
    main()
