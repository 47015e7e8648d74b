"""`recipe check`'s run-time estimate against the run it estimates, timed in the same test.

Not a speed target: both sides are measured here on the same machine a moment apart, and
the bound is wide (a factor of 3 either way, common practice for a planning estimate). It
catches an estimate built on the wrong work: before the probes mirrored `recipe run`'s
stacked groups and left one-off imports out, the estimate for a stacked grid like this was
several times the real run."""

import time

import pytest
from conftest import write_recipe

from runner.execution.estimate import estimate_seconds
from runner.execution.planning import execute, make_executor
from runner.recipe.grid import expand
from runner.recipe.loader import load_recipe
from runner.store.database import Store

RECIPE = """
    name = "estimate"
    seeds = [1, 2, 3, 4]
    [data]
    source = "digits"
    split = { val = 0.2, test = 0.0 }
    [model]
    hidden = [64, 64]
    [train]
    optimizer = "adam"
    batch_size = 32
    epochs = 6
    [factors]
    "train.lr" = [1e-3, 3e-3]
"""


@pytest.mark.parametrize("stack", [True, False], ids=["stacked", "one-at-a-time"])
def test_estimate_is_within_a_factor_of_three_of_the_run(tmp_path, stack):
    grid = expand(load_recipe(write_recipe(tmp_path, RECIPE)))
    todo = list(grid)
    estimate = estimate_seconds(grid, todo, workers=1, stack=stack)
    with Store(tmp_path / "s.sqlite") as db:
        start = time.perf_counter()
        execute(grid, db, todo, make_executor("local", 1), stack=stack)  # in this process, one thread
        actual = time.perf_counter() - start
        assert {r.status for r in db.jobs()} == {"done"}
    assert actual / 3 < estimate < actual * 3, (estimate, actual)


def test_estimate_deals_items_to_the_least_loaded_worker(tmp_path):
    """More workers than work items: the estimate is the longest item, not the total / workers."""
    grid = expand(load_recipe(write_recipe(tmp_path, RECIPE)))
    one = estimate_seconds(grid, list(grid), workers=1, stack=True)  # 8 jobs: one stacked group
    many = estimate_seconds(grid, list(grid), workers=4, stack=True)
    assert many == pytest.approx(one, rel=0.5)  # one group runs on one worker, however many there are
