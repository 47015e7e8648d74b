"""schema: the JSON Schema and the validator agree on every example and invalid fixture."""

import json

import jsonschema
import pytest
import tomli
from conftest import DATA, ROOT, invoke

from runner.errors import UserError
from runner.recipe.grid import expand
from runner.recipe.loader import load_recipe
from runner.recipe.schema import recipe_schema

VALIDATOR = jsonschema.Draft202012Validator(recipe_schema())

# Fixtures whose problem needs the data or spans several settings: the schema cannot see it
# (documented in runner/schema.py), so only the validator rejects them.
VALIDATOR_ONLY = {
    "missing_target",
    "text_feature",
    "missing_file",
    "exclude_all",
    "nesterov_no_momentum",
    "wrong_metric_task",
    "huge_layer",  # needs the data's width to estimate the memory
    "seeds_float",  # TOML's 1.0 is a float, but JSON's data model has one number type: 1.0 is an integer there
}


def schema_accepts(path) -> bool:
    try:
        doc = tomli.loads(path.read_text())
    except (tomli.TOMLDecodeError, RecursionError):
        return False
    return VALIDATOR.is_valid(doc)


def validator_accepts(path) -> bool:
    try:
        expand(load_recipe(path))
    except UserError:
        return False
    return True


def test_schema_is_a_valid_draft_2020_12_schema():
    jsonschema.Draft202012Validator.check_schema(recipe_schema())


@pytest.mark.parametrize("path", sorted((ROOT / "recipes").glob("*.toml")), ids=lambda p: p.name)
def test_examples_pass_both(path):
    assert validator_accepts(path)
    errors = list(VALIDATOR.iter_errors(tomli.loads(path.read_text())))
    assert not errors, errors[0].message


@pytest.mark.parametrize("path", sorted(DATA.glob("*.toml")), ids=lambda p: p.stem)
def test_invalid_fixtures_agree(path):
    assert not validator_accepts(path)
    assert schema_accepts(path) == (path.stem in VALIDATOR_ONLY)


def test_schema_command_prints_json():
    result = invoke("schema")
    assert result.exit_code == 0
    assert json.loads(result.stdout)["properties"]["train"]["properties"]["lr"]["exclusiveMinimum"] == 0


@pytest.mark.parametrize(("workers", "valid"), [(0, True), (1, True), (4096, True), (-1, False), (4097, False)])
def test_run_workers_schema_and_validator_agree(tmp_path, workers, valid):
    """0 means "chosen by the tool" in both; the schema and `recipe check` accept the same values."""
    path = tmp_path / "w.toml"
    path.write_text(f'name = "w"\n[data]\nsource = "iris"\n[run]\nworkers = {workers}\n')
    assert schema_accepts(path) == valid
    result = invoke("check", path, "--no-probe")
    assert (result.exit_code == 0) == valid, result.stderr
    if not valid:
        assert "run.workers" in result.stderr and "from 0 to 4096" in result.stderr
