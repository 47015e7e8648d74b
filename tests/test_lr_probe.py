"""lr_probe: the learning-rate range test. Where theory gives the answer it is checked
against it: full-batch gradient descent on least squares multiplies the error along the
Hessian's top eigenvector by |1 - lr * L| each step (L its largest eigenvalue, computed here
in closed form), so the loss cannot blow up below lr = 2/L, and a slower sweep finds the
blow-up closer to 2/L. Through the CLI, `recipe check --lr-probe` says what to try, warns
of a recipe level past the blow-up, and keeps the probe for the report's figure."""

import json
import sqlite3

import numpy as np
from conftest import invoke, write_recipe

from runner.datasets.splits import split_and_scale
from runner.recipe.grid import expand
from runner.recipe.loader import load_recipe
from runner.training.lr_probe import probe

LEAST_SQUARES = """
    name = "lsq"
    seeds = [1]
    [data]
    source = "diabetes"
    [model]
    hidden = []
    [train]
    optimizer = "sgd"
    batch_size = "full"
"""


def test_gradient_descent_on_least_squares_blows_up_just_past_two_over_l(tmp_path):
    grid = expand(load_recipe(write_recipe(tmp_path, LEAST_SQUARES)))
    job = grid[0]
    ds = grid.datasets[job.config.data_id]
    sp = split_and_scale(ds, job.config.settings.data, job.seed)
    X = np.c_[sp.X_train.astype(np.float64), np.ones(len(sp.X_train))]  # weights and bias
    hessian = 2.0 / len(X) * X.T @ X  # of mean squared error on the standardized target
    limit = 2.0 / np.linalg.eigvalsh(hessian).max()
    ratios = []
    for steps in (400, 2000):
        found = probe(job.spec(), ds, steps=steps, lr_min=1e-3, lr_max=10.0)
        assert found.blowup is not None and found.blowup >= limit  # never below the stability limit
        ratios.append(found.blowup / limit)
        assert found.levels and max(found.levels) < limit  # what it suggests is stable
    assert ratios[1] < ratios[0] and ratios[1] < 1.4, ratios  # a slower sweep closes in on 2/L


def test_check_suggests_levels_and_warns_of_a_rate_past_the_blow_up(tmp_path):
    path = write_recipe(
        tmp_path,
        """
        name = "rates"
        seeds = [1]
        [data]
        source = "wine"
        [model]
        hidden = [16]
        [train]
        optimizer = "sgd"
        [factors]
        "train.lr" = [0.01, 8.0]
        """,
    )
    store = tmp_path / "s.sqlite"
    assert invoke("run", path, "--store", store, "--workers", 1, "-q").exit_code == 0
    result = invoke("check", path, "--store", store, "--no-probe", "--lr-probe")
    assert result.exit_code == 0, result.stderr
    line = next(ln for ln in result.stdout.splitlines() if ln.startswith("lr probe, sgd"))
    assert "levels worth trying" in line and "Warning: the recipe's 8 is near or past the blow-up" in line
    assert "0.01 is" not in line
    with sqlite3.connect(store) as c:
        (kept,) = c.execute("SELECT result FROM lr_probes").fetchone()
    assert json.loads(kept)["blowup"] is not None
    report = tmp_path / "report.html"
    assert invoke("report", path, "--store", store, "--out", report).exit_code == 0
    assert 'id="fig-lr-probe"' in report.read_text()  # the stored probe is drawn


def test_new_writes_the_probes_rates_into_a_starter(tmp_path):
    from conftest import ROOT

    from runner.training.lr_probe import probed_jobs

    out = tmp_path / "kiln.toml"
    result = invoke("new", ROOT / "data" / "kiln_batches.csv", "--out", out, "--lr-probe")
    assert result.exit_code == 0, result.stderr
    assert "range test" in out.read_text() and invoke("check", out, "--no-probe").exit_code == 0
    grid = expand(load_recipe(out))
    written: dict = {}
    for config in grid.configs:
        t = config.settings.train
        written.setdefault(t.optimizer, set()).add(t.lr)
    for optimizer, (_, job) in probed_jobs(grid).items():  # the probe ignores the job's own rate
        levels = probe(job.spec(), grid.datasets[job.config.data_id]).levels
        assert written[optimizer] == set(levels[:2]), (optimizer, written[optimizer], levels)
