"""estimate: `recipe check`'s run-time estimate. The dealing of work items to workers and
the costing of items are tested with injected per-item costs (no clock); the estimate
against a real run is compared in bench/estimate.py, not here (timings flake under load)."""

import pytest
from conftest import write_recipe

from runner.execution.estimate import deal, item_costs, work_items
from runner.recipe.grid import expand
from runner.recipe.loader import load_recipe
from runner.training.grouping import Stacked

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


@pytest.mark.parametrize(
    "costs, workers, expected",
    [
        ([5, 3, 3, 2], 2, 7),  # LPT: 5 | 3, 3 -> 5 | 6 -> 5 + 2 = 7 vs 6
        ([5, 3, 3, 2], 1, 13),  # one worker: the sum
        ([4], 8, 4),  # more workers than items: the longest item
        ([2, 2, 2, 2], 4, 2),
        ([], 3, 0),
    ],
)
def test_items_go_longest_first_to_the_least_loaded_worker(costs, workers, expected):
    """Graham's longest-processing-time rule, by hand."""
    assert deal(costs, workers) == expected


def test_one_stacked_group_runs_on_one_worker_however_many_there_are(tmp_path):
    grid = expand(load_recipe(write_recipe(tmp_path, RECIPE)))
    items = work_items(grid, list(grid), stack=True)
    assert len(items) == 1 and isinstance(items[0], Stacked) and len(items[0]) == 8
    costs = item_costs(items, {"anything": 0.01})  # an unprobed kind gets the mean of the probed ones
    assert costs == [pytest.approx(0.01 * 8 * 6)]
    assert deal(costs, 1) == deal(costs, 4)


def test_without_stacking_every_job_is_its_own_item(tmp_path):
    grid = expand(load_recipe(write_recipe(tmp_path, RECIPE)))
    items = work_items(grid, list(grid)[:3], stack=False)
    assert [len(it) for it in items] == [1, 1, 1] and not any(isinstance(it, Stacked) for it in items)
    assert deal(item_costs(items, {"x": 1.0}), 2) == pytest.approx(12.0)  # 6 epochs each: 6 + 6 on one worker
