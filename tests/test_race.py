"""race: adaptive seeding (racing) through the CLI: fewer jobs than the full grid, a winner the
full grid's evidence accepts, looks stored per round, resumable and rerunnable, and the rule
itself against the studentized range from scipy (Tukey 1953; Hsu 1996's comparisons with
the best)."""

import json
import sqlite3

import numpy as np
import pytest
from conftest import invoke, stored_metrics, write_recipe
from scipy.stats import studentized_range

from runner.api import run
from runner.errors import UserError
from runner.evidence.protocols import FIXED
from runner.evidence.race import RacePlan, advance, look

RACE = """
    name = "race"
    seeds = [1, 2, 3, 4, 5, 6]
    [data]
    source = "iris"
    split = { val = 0.3, test = 0.2, validation = "fixed" }
    [model]
    hidden = [16]
    [train]
    epochs = 12
    batch_size = 16
    [factors.optimizer]              # two rates far too small for their optimizer, two suited ones
    labels = ["sgd 0.0003", "sgd 0.1", "adam 0.01", "adam 0.00001"]
    "train.optimizer" = ["sgd", "sgd", "adam", "adam"]
    "train.lr" = [0.0003, 0.1, 0.01, 0.00001]
    [adaptive]
    first_seeds = 3
"""


def _full(text: str) -> str:
    return text.split("    [adaptive]")[0]


def _board(recipe, store) -> dict:
    result = invoke("board", recipe, "--store", store, "--format", "json")
    assert result.exit_code == 0, result.stderr
    return json.loads(result.stdout)


def _looks(store) -> list[tuple]:
    with sqlite3.connect(store) as c:
        return list(c.execute("SELECT race, round, look FROM race_looks ORDER BY race, round"))


def test_race_trains_fewer_jobs_and_names_a_winner_the_full_grid_accepts(tmp_path):
    raced = write_recipe(tmp_path, RACE)
    full = write_recipe(tmp_path, _full(RACE), name="full.toml")
    result = invoke("run", raced, "--store", tmp_path / "a.sqlite", "--workers", 1)
    assert result.exit_code == 0, result.stderr
    assert "round 1: 4 configurations, 12 jobs to run" in result.stderr
    doc = _board(raced, tmp_path / "a.sqlite")
    assert doc["jobs"]["done"] < doc["jobs"]["total"] == 24
    assert doc["jobs"]["skipped"] == 24 - doc["jobs"]["done"] and doc["jobs"]["pending"] == 0
    assert doc["race"]["finished"] and doc["race"]["looks_planned"] == 4
    assert doc["race"]["alpha_look"] == pytest.approx(0.05 / 4)
    by_label = {r["labels"]["optimizer"]: r for r in doc["rows"]}
    for slow in ("sgd 0.0003", "adam 0.00001"):  # far behind after the first round
        assert by_label[slow]["race"]["dropped_round"] == 1 and by_label[slow]["n"] == 3
        assert by_label[slow]["verdict"]["kind"] == "behind"
        assert by_label[slow]["race"]["reason"].startswith("dropped: behind the best of the others")
    winner = doc["rows"][0]
    assert winner["race"]["dropped_round"] is None and winner["n"] == 6
    assert any("Dropped after round 1 (3 seeds)" in c for c in doc["cautions"])
    table = invoke("board", raced, "--store", tmp_path / "a.sqlite").stdout
    assert "dropped after round 1" in table and "not run (adaptive seeding)" in table

    assert invoke("run", full, "--store", tmp_path / "f.sqlite", "--workers", 1, "-q").exit_code == 0
    full_doc = _board(full, tmp_path / "f.sqlite")
    accepted = {r["labels"]["optimizer"] for r in full_doc["rows"] if r["possibly_best"]}
    assert winner["labels"]["optimizer"] in accepted


def test_a_finished_race_trains_nothing_when_run_again(tmp_path):
    recipe = write_recipe(tmp_path, RACE)
    store = tmp_path / "s.sqlite"
    assert invoke("run", recipe, "--store", store, "--workers", 1, "-q").exit_code == 0
    before, looks = stored_metrics(store), _looks(store)
    with sqlite3.connect(store) as c:
        finished = sorted(c.execute("SELECT key, finished FROM jobs"))
    again = invoke("run", recipe, "--store", store, "--workers", 1)
    assert again.exit_code == 0
    assert "the race has ended" in again.stderr and "0 to run" in again.stderr
    assert "round" not in again.stderr.split("0 to run", 1)[1].split("race:")[0]
    with sqlite3.connect(store) as c:
        assert sorted(c.execute("SELECT key, finished FROM jobs")) == finished
    assert stored_metrics(store) == before and _looks(store) == looks


def test_a_race_sizes_each_round_and_the_api_races_as_the_cli_does(tmp_path):
    # each round gets the executor its own work items pay for (a small race starts no
    # worker pool: it was 1.5x slower than --workers 1 when every round had one), and the
    # Python API's run() races an adaptive recipe as `recipe run` does (it trained the full grid)
    recipe = write_recipe(tmp_path, RACE)
    cli = invoke("run", recipe, "--store", tmp_path / "cli.sqlite")
    assert cli.exit_code == 0, cli.stderr
    rounds = [ln for ln in cli.stderr.splitlines() if ln.startswith("training ")]
    assert len(rounds) >= 2 and all(ln.endswith(" in this process") for ln in rounds), rounds
    run(recipe, store=tmp_path / "api.sqlite", quiet=True)
    assert _board(recipe, tmp_path / "api.sqlite")["jobs"]["done"] < 24
    assert stored_metrics(tmp_path / "api.sqlite") == stored_metrics(tmp_path / "cli.sqlite")
    assert _looks(tmp_path / "api.sqlite") == _looks(tmp_path / "cli.sqlite")


def test_ablation_of_a_race_uses_the_first_round_seeds_only(tmp_path):
    """Dropped configurations cannot bias the ablation: it equals the ablation of the same
    grid on the first three seeds (every configuration got them before any decision)."""
    raced = write_recipe(tmp_path, RACE + '\n    [factors]\n    "train.l2" = [0.0, 0.001]\n')
    store = tmp_path / "s.sqlite"
    assert invoke("run", raced, "--store", store, "--workers", 1, "-q").exit_code == 0
    text = _full(RACE).replace("seeds = [1, 2, 3, 4, 5, 6]", "seeds = [1, 2, 3]")
    first = write_recipe(tmp_path, text + '\n    [factors]\n    "train.l2" = [0.0, 0.001]\n', name="first.toml")
    raced_doc, first_doc = _board(raced, store), _board(first, store)
    assert first_doc["jobs"]["pending"] == 0  # every first-round job is in the race's store
    assert raced_doc["ablation"]["main_effects"] == first_doc["ablation"]["main_effects"]
    assert all(lvl["n_seeds"] == 3 for e in raced_doc["ablation"]["main_effects"] for lvl in e["levels"])


def test_bad_adaptive_settings_are_one_line_errors(tmp_path):
    too_many = write_recipe(tmp_path, RACE.replace("first_seeds = 3", "first_seeds = 6"), name="a.toml")
    result = invoke("check", too_many, "--no-probe")
    assert result.exit_code == 2
    assert "adaptive.first_seeds: must be fewer than the recipe's 6 seeds" in result.stderr
    assert "Traceback" not in result.stderr and len(result.stderr.strip().splitlines()) == 1
    small = write_recipe(tmp_path, RACE.replace("first_seeds = 3", "first_seeds = 3\n    max_jobs = 10"), "b.toml")
    result = invoke("run", small, "--store", tmp_path / "b.sqlite", "--workers", 1)
    assert result.exit_code == 2 and "adaptive.max_jobs: is below the first round's 12 jobs" in result.stderr
    ok = write_recipe(tmp_path, RACE, name="c.toml")
    assert invoke("run", ok, "--store", tmp_path / "c.sqlite", "--workers", 1, "-q").exit_code == 0
    before = stored_metrics(tmp_path / "c.sqlite")
    for extra in ([], ["-q"], ["--fresh", "--yes"]):  # refused quiet or not, before --fresh deletes anything
        result = invoke("run", ok, "--store", tmp_path / "c.sqlite", "--retry-failed", *extra)
        assert result.exit_code == 2 and "--retry-failed cannot be used with [adaptive]" in result.stderr, extra
    assert stored_metrics(tmp_path / "c.sqlite") == before
    with pytest.raises(UserError, match=r"cannot be used with \[adaptive\]"):  # the Python API refuses it too
        run(ok, store=tmp_path / "c.sqlite", retry_failed=True, quiet=True)


def test_job_budget_stops_the_race_before_a_round_that_would_pass_it(tmp_path):
    recipe = write_recipe(tmp_path, RACE.replace("first_seeds = 3", "first_seeds = 3\n    max_jobs = 15"))
    store = tmp_path / "s.sqlite"
    assert invoke("run", recipe, "--store", store, "--workers", 1, "-q").exit_code == 0
    doc = _board(recipe, store)
    assert doc["jobs"]["done"] == 12 + 2  # round 3 would have made 16 > 15
    assert "job budget" in doc["race"]["stop"] and len(doc["race"]["rounds"]) == 2


def _plan(k, seeds=6, first=3, margin=0.0, max_jobs=0):
    return RacePlan(tuple(f"c{i}" for i in range(k)), tuple(range(1, seeds + 1)), first, "val.x", "max", 0.05,
                    margin, max_jobs)  # fmt: skip


def _values(y):
    return {f"c{i}": {(s + 1, None): float(v) for s, v in enumerate(row)} for i, row in enumerate(y)}


def test_look_is_constrained_mcb_with_the_studentized_range_at_alpha_over_looks():
    """Hsu 1996's constrained comparisons with the best, with Tukey's studentized-range
    constant (scipy.stats.studentized_range) for all k configurations at level alpha/L, and
    the residual mean square of configurations + seeds computed here from its formula."""
    rng = np.random.default_rng(3)
    y = rng.normal(0, 1, (5, 3)) + rng.normal(0, 2, 3) + np.array([[0], [0.3], [-9], [-0.5], [-12]])
    plan = _plan(8)  # the grid has 8 configurations; 5 are still racing
    lk = look(plan, 1, _values(y), [f"c{i}" for i in range(5)], FIXED, used=24)
    resid = y - y.mean(1, keepdims=True) - y.mean(0, keepdims=True) + y.mean()
    df = 4 * 2
    s = np.sqrt((resid**2).sum() / df)
    q = studentized_range.ppf(1 - 0.05 / 4, 8, df)
    w = q * s * np.sqrt(1 / 3)
    means = y.mean(1)
    for i, d in enumerate(lk.decisions):
        adv = means[i] - np.max(np.delete(means, i))
        assert d.advantage == pytest.approx(adv, abs=1e-12)
        assert d.kept == (adv + w >= 0)
        assert d.high == pytest.approx(adv + w, rel=1e-6)
    assert lk.critical == pytest.approx(q, rel=1e-4) and lk.alpha == 0.05 / 4
    assert [d.kept for d in lk.decisions] == [True, True, False, True, False]


def test_advance_replays_rounds_and_asks_only_for_the_next_round():
    """Given every value of a simulated grid the race looks after each round, asks for the
    round's seed of the survivors only, and stops at one survivor, the margin or the seeds."""
    rng = np.random.default_rng(0)
    y = rng.normal(0, 0.2, (4, 6)) + np.array([[0], [-8], [-8], [-0.05]])
    values = _values(y)
    plan = _plan(4)
    partial = {c: {u: v for u, v in vs.items() if u[0] <= 3} for c, vs in values.items()}
    state = advance(plan, partial, {c: set(v) for c, v in partial.items()}, FIXED)
    assert [lk.round for lk in state.looks] == [1] and state.alive == ("c0", "c3")
    assert state.wanted == {"c0": (4,), "c3": (4,)}
    done = advance(plan, values, {c: set(v) for c, v in values.items()}, FIXED)
    assert done.finished and done.stop == "the seeds list is used up" and len(done.looks) == 4
    assert done.jobs_used() == 12 + 2 * 3
    close = advance(_plan(4, margin=5.0), values, {c: set(v) for c, v in values.items()}, FIXED)
    assert close.stop.startswith("every remaining configuration is within +-5")


def test_a_diverged_seed_drops_its_configuration_at_the_next_look():
    y = np.array([[0.9, 0.91, 0.92], [0.5, 0.52, 0.49], [0.89, 0.9, 0.9]])
    values = _values(y)
    finished = {c: set(v) for c, v in values.items()}
    del values["c2"][(2, None)]  # finished, but diverged: no value
    lk = look(_plan(3), 1, values, ["c0", "c1", "c2"], FIXED, used=9)
    assert not lk.decisions[2].kept and "diverged" in lk.decisions[2].reason
    assert advance(_plan(3), values, finished, FIXED).looks[0].decisions[2].kept is False


SLOW_RACE = RACE.replace("epochs = 12", "epochs = 150").replace("hidden = [16]", "hidden = [32, 32]\n    dropout = 0.1")


def _store_rows(store):
    with sqlite3.connect(store) as c:
        metrics = sorted(c.execute("SELECT job_key, split, name, value FROM metrics"))
        curves = sorted(c.execute("SELECT job_key, name, epoch, value FROM curves"))
        ok = c.execute("PRAGMA integrity_check").fetchone()[0]
    return metrics, curves, ok


def _count(store, table):
    try:
        with sqlite3.connect(store, timeout=1) as c:
            return c.execute(f"SELECT count(*) FROM {table}").fetchone()[0]
    except sqlite3.OperationalError:
        return 0


@pytest.mark.slow
def test_sigkilled_race_resumes_where_it_stopped_and_equals_an_uninterrupted_one(tmp_path):
    """A real SIGKILL of the runner and its workers after the first look is stored: the
    resumed race decides nothing twice, and its store (metrics, curves, looks) equals an
    uninterrupted race's bit for bit."""
    import os
    import signal
    import subprocess
    import time

    from conftest import PYTHON, subprocess_env

    recipe = write_recipe(tmp_path, SLOW_RACE)
    killed = tmp_path / "killed.sqlite"
    proc = subprocess.Popen(
        [PYTHON, "-m", "runner", "run", str(recipe), "--store", str(killed), "--workers", "2", "-q"],
        env=subprocess_env(), start_new_session=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
    )  # fmt: skip
    deadline = time.monotonic() + 300
    while _count(killed, "race_looks") < 1 and time.monotonic() < deadline and proc.poll() is None:
        time.sleep(0.05)
    os.killpg(proc.pid, signal.SIGKILL)
    proc.wait()
    looks_before = _looks(killed)
    assert 1 <= len(looks_before) < 4 and _store_rows(killed)[2] == "ok", "the kill should land mid-race"

    result = invoke("run", recipe, "--store", killed, "--workers", 2, "-q")
    assert result.exit_code == 0, result.stderr
    assert _looks(killed)[: len(looks_before)] == looks_before  # stored looks are never rewritten
    clean = tmp_path / "clean.sqlite"
    assert invoke("run", recipe, "--store", clean, "--workers", 1, "-q").exit_code == 0
    assert _store_rows(killed) == _store_rows(clean)  # float equality on every stored number
    assert _looks(killed) == _looks(clean)


@pytest.mark.slow
def test_race_on_a_dask_local_cluster_matches_a_local_race(tmp_path):
    pytest.importorskip("distributed")
    recipe = write_recipe(tmp_path, RACE)
    dask_store, local = tmp_path / "dask.sqlite", tmp_path / "local.sqlite"
    result = invoke("run", recipe, "--store", dask_store, "--on", "dask-local", "--workers", 2, "-q")
    assert result.exit_code == 0, result.stderr
    assert invoke("run", recipe, "--store", local, "--workers", 1, "-q").exit_code == 0
    assert stored_metrics(dask_store) == stored_metrics(local)
    assert _looks(dask_store) == _looks(local) and len(_looks(local)) >= 2
