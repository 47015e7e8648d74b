"""sizing: the default worker count from the plan, and long stacked groups cut short."""

import dataclasses
import textwrap

import pytest

from runner.execution import sizing
from runner.execution.sizing import choose_workers, cut_long_groups, item_seconds, predicted_wall
from runner.recipe.grid import expand
from runner.recipe.loader import parse_recipe
from runner.training.grouping import Stacked, group_specs

GRID = """
name = "size"
seeds = {seeds}
[data]
source = "digits"
[model]
hidden = [64, 64]
[train]
batch_size = 64
epochs = {epochs}
[factors]
"train.lr" = [1e-3, 3e-3, 1e-2, 3e-2]
"""


def _items(tmp_path, seeds, epochs):
    grid = expand(parse_recipe(textwrap.dedent(GRID.format(seeds=seeds, epochs=epochs)), tmp_path / "s.toml"))
    return group_specs([j.spec() for j in grid], grid.datasets), grid.datasets


def test_dealing_longest_first_to_the_least_loaded():
    # [3, 2, 2, 1] on two workers: 3 + 1 and 2 + 2, so 4 s of work each, then start and slowdown
    assert predicted_wall([1, 2, 3, 2], 2) == pytest.approx(sizing.POOL_START + 4 * sizing.BUSY_SLOWDOWN)
    assert predicted_wall([1, 2, 3, 2], 1) == 8


def test_a_small_plan_stays_in_process_and_a_large_one_uses_the_cores(tmp_path):
    small, datasets = _items(tmp_path, [1, 2], epochs=5)
    assert choose_workers(small, datasets, cores=2) == 1
    large, datasets = _items(tmp_path, list(range(1, 33)), epochs=60)  # 8 groups of 16, many seconds each
    assert len(large) == 8 and choose_workers(large, datasets, cores=2) == 2
    assert choose_workers(large, datasets, cores=1) == 1
    assert choose_workers(large[:1], datasets, cores=4) == 1  # never more workers than items


def test_the_estimate_counts_arithmetic_as_six_multiply_adds_per_row_and_weight(tmp_path):
    # forward 2 FLOPs per weight and row, backward about twice that (common practice)
    (item,), datasets = _items(tmp_path, [1], epochs=10)
    ds = datasets[item[0].data_id]
    longer = Stacked(dataclasses.replace(s, settings=s.settings.with_train(epochs=20)) for s in item)
    assert item_seconds(longer, ds) == pytest.approx(2 * item_seconds(item, ds))
    n_val, n_train = 359, 1797 - 359 - 359  # val and test 0.2 of 1797 rows, as the estimate rounds
    steps = 10 * -(-n_train // 64)
    flops = item_seconds(item, ds) - steps * (sizing.STACKED_STEP + 4 * sizing.STACKED_MEMBER_STEP)
    macs = 64 * 64 + 64 * 64 + 64 * 10
    assert flops * sizing.STACKED_FLOP_RATE == pytest.approx(4 * 10 * (6 * macs * n_train + 2 * macs * n_val))


def test_long_groups_are_cut_and_keep_their_members_in_order(tmp_path, monkeypatch):
    items, datasets = _items(tmp_path, list(range(1, 5)), epochs=10)
    (group,) = items
    seconds = item_seconds(group, datasets[group[0].data_id])
    monkeypatch.setattr(sizing, "LONG_ITEM", seconds / 2.5)  # as if the group were 2.5 times too long
    cut = cut_long_groups(items, datasets)
    assert [len(g) for g in cut] == [5, 6, 5] and all(isinstance(g, Stacked) for g in cut)
    assert [s for g in cut for s in g] == list(group)
    monkeypatch.setattr(sizing, "LONG_ITEM", seconds / 100)  # never below MIN_MEMBERS a group
    assert [len(g) for g in cut_long_groups(items, datasets)] == [4, 4, 4, 4]


def test_groups_stacked_through_torch_func_are_sized_by_what_their_modules_output(tmp_path):
    # a CNN's stacked group spends its time in vmap's per-number work (convolutions,
    # pooling, activations), not in products: several times an MLP group of the same
    # multiply-adds (bench/RESULTS.md: a 16-member CNN group of 25,408 multiply-adds per
    # example took 2.9-3.1 s for 3 epochs, where a stacked MLP group of 8,832 took
    # 0.81-0.84 s for 10, about 0.8 s for 3 epochs scaled to 25,408), and two such groups
    # pay for a pool
    text = GRID.format(seeds=[1, 2, 3, 4, 5, 6, 7, 8], epochs=3)
    cnn = text.replace("hidden = [64, 64]", 'kind = "cnn"\nchannels = [8, 16]\nhidden = [32]')
    mlp = text.replace("hidden = [64, 64]", "hidden = [368, 4]")  # about the CNN's 25,400 multiply-adds per row
    sized = {}
    for name, recipe in (("cnn", cnn), ("mlp", mlp)):
        grid = expand(parse_recipe(textwrap.dedent(recipe), tmp_path / f"{name}.toml"))
        items = group_specs([j.spec() for j in grid], grid.datasets)
        assert [len(it) for it in items] == [16, 16]
        ds = grid.datasets[items[0][0].data_id]
        sized[name] = choose_workers(items, grid.datasets, cores=2), item_seconds(items[0], ds)
    assert sized["cnn"][0] == 2
    assert sized["cnn"][1] > 3 * sized["mlp"][1]
