"""Every example recipe validates and expands; linked factors take level labels."""

from pathlib import Path

import pytest
from conftest import ROOT, write_recipe

from runner.errors import UserError
from runner.recipe.grid import expand
from runner.recipe.loader import load_recipe

EXAMPLES = sorted((ROOT / "recipes").glob("*.toml"))


@pytest.mark.parametrize("path", EXAMPLES, ids=lambda p: p.name)
def test_example_recipe_expands(path: Path):
    grid = expand(load_recipe(path))
    assert len(grid) == len(grid.configs) * len(grid.recipe.seeds) > 0


def test_example_recipes_present():
    names = {p.name for p in EXAMPLES}
    assert {
        "quickstart.toml",
        "depth_and_init.toml",
        "optimizers.toml",
        "regularization.toml",
        "digits_cnn.toml",
    } <= names


def test_linked_labels_name_levels_and_baseline(tmp_path):
    recipe = load_recipe(
        write_recipe(
            tmp_path,
            """
        name = "x"
        [data]
        source = "iris"
        [factors.reg]
        labels = ["none", "l2"]
        "train.l2" = [0.0, 0.01]
        [baseline]
        reg = "l2"
    """,
        )
    )
    assert [recipe.factors[0].label(i) for i in range(2)] == ["none", "l2"]
    assert recipe.baseline == {"reg": 1}


def test_linked_labels_must_match_levels(tmp_path):
    with pytest.raises(UserError, match="one per level"):
        load_recipe(
            write_recipe(
                tmp_path,
                """
            name = "x"
            [data]
            source = "iris"
            [factors.reg]
            labels = ["none"]
            "train.l2" = [0.0, 0.01]
        """,
            )
        )
