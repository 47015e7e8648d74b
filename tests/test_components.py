"""components: every registered component, walked generically. Each worked example in a
component's EXAMPLES validates and trains a job (on the single path, and on the stacked
path where the job stacks), and each invalid one is refused with its message; every
setting a component declares has a constraint and a one-line doc."""

import copy

import pytest

from runner.components import activations, initializers, lr_schedules, metrics, optimizers, regularizers
from runner.errors import RecipeError
from runner.recipe.grid import expand
from runner.recipe.loader import recipe_from_tables
from runner.recipe.settings import SECTIONS
from runner.training.grouping import Stacked, group_specs
from runner.training.job import Status
from runner.training.loop import train_item

REGISTRIES = {
    "optimizer": (optimizers.EXAMPLES, optimizers.OPTIMIZERS),
    "activation": (activations.EXAMPLES, activations.ACTIVATIONS),
    "initializer": (initializers.EXAMPLES, initializers.INITIALIZERS),
    "lr schedule": (lr_schedules.EXAMPLES, lr_schedules.SCHEDULES),
    "metric": (metrics.EXAMPLES, metrics.METRICS),
    "regularizer": (regularizers.EXAMPLES, None),
}
BASE = {
    "name": "walk",
    "seeds": [1],
    "data": {"source": "iris"},
    "model": {"hidden": [8]},
    "train": {"epochs": 2, "batch_size": 16, "lr": 0.01},
}
CASES = [(kind, name) for kind, (examples, _) in REGISTRIES.items() for name in examples]


def _recipe(example: dict):
    raw = copy.deepcopy(BASE)
    for key, value in example.items():
        if isinstance(value, dict):
            raw.setdefault(key, {}).update(value)
        else:
            raw[key] = value
    from pathlib import Path

    return recipe_from_tables(raw, "", Path("walk.toml"))


@pytest.mark.parametrize("kind", [k for k, (_, reg) in REGISTRIES.items() if reg is not None])
def test_every_registered_name_has_examples(kind):
    examples, registry = REGISTRIES[kind]
    assert sorted(examples) == sorted(registry)
    assert all(e.valid for e in examples.values())


@pytest.mark.parametrize("kind, name", CASES)
def test_valid_examples_validate_and_train(kind, name):
    """Each valid example trains to a finished job on every path it can take."""
    for example in REGISTRIES[kind][0][name].valid:
        grid = expand(_recipe(example))
        specs = [job.spec() for job in grid]
        for item in [*group_specs(specs, grid.datasets, enabled=True), *group_specs(specs, grid.datasets, False)]:
            for result in train_item(item, grid.datasets):
                assert result.status is Status.DONE, (example, type(item).__name__, result.error)
                assert not result.notes
                assert "val" in result.metrics


@pytest.mark.parametrize("kind, name", [c for c in CASES if REGISTRIES[c[0]][0][c[1]].invalid])
def test_invalid_examples_are_refused_with_their_message(kind, name):
    for example, fragment in REGISTRIES[kind][0][name].invalid:
        with pytest.raises(RecipeError) as err:
            expand(_recipe(example))
        assert fragment in err.value.message()


def test_stacked_forms_cover_their_registries():
    """Every activation has a stacked form; the stacked optimizers are registered ones."""
    for name in activations.ACTIVATIONS:
        forward, backward, in_place = activations.stacked_activation(name)
        assert callable(forward) and callable(backward) and isinstance(in_place, bool)
    assert set(optimizers.STACKED_OPTIMIZERS) <= set(optimizers.OPTIMIZERS)
    assert Stacked  # the stacked path is reached through group_specs above


@pytest.mark.parametrize("section", sorted(SECTIONS))
def test_every_setting_has_a_constraint_and_a_doc(section):
    def walk(table, prefix):
        for key, param in table.items():
            if param.table is not None:
                walk(param.table, f"{prefix}.{key}")
                continue
            assert param.constraint is not None, f"{prefix}.{key}"
            assert param.doc.strip(), f"{prefix}.{key}"
            assert param.constraint.allowed(), f"{prefix}.{key}"

    walk(SECTIONS[section], section)
