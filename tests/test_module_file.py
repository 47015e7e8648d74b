"""module_file: the recipe side of a user's network (model.kind = "python"): its settings,
constructor arguments as frozen values, their JSON Schema, and which files may be read."""

import jsonschema
import pytest
import tomli
from conftest import DATA, ROOT

from runner.errors import RecipeError
from runner.recipe.constraints import Arguments, Invalid
from runner.recipe.schema import recipe_schema
from runner.recipe.settings import all_paths, param_at

NETWORKS = DATA / "networks"
VALIDATOR = jsonschema.Draft202012Validator(recipe_schema())

# The network fixtures whose problem the schema sees (a table where a value belongs); the
# others need the file, the data or the code, which only `recipe check` has.
SCHEMA_SEES = {"arg_table", "factor_arg"}


def test_arguments_become_a_sorted_hashable_tuple():
    args = Arguments().check({"width": 64, "act": "relu", "sizes": [[1, 2], [3]], "scale": 0.5, "bias": True})
    assert args == (("act", "relu"), ("bias", True), ("scale", 0.5), ("sizes", ((1, 2), (3,))), ("width", 64))
    assert hash(args) == hash(Arguments().check(dict(reversed(list(dict(args).items())))))
    assert Arguments().check(args) == args  # an already resolved configuration's value
    for bad, key in (({"w": {"a": 1}}, "w"), ({"w": float("nan")}, "w"), ({"lambda": 1}, "lambda"), ({"2x": 1}, "2x")):
        with pytest.raises(Invalid) as info:
            Arguments().check(bad)
        assert info.value.key == key


def test_each_argument_is_a_factor_path_but_the_table_is_not():
    assert param_at("model.args.width") is not None
    assert param_at("model.args") is None and param_at("model.args.class") is None
    assert param_at("model.args.width.deeper") is None
    assert "model.args" not in all_paths() and {"model.file", "model.class_name"} <= set(all_paths())


@pytest.mark.parametrize("path", sorted(NETWORKS.glob("*.toml")), ids=lambda p: p.stem)
def test_schema_and_validator_agree_on_the_network_fixtures(path):
    """All are invalid for the validator (tests/test_user_module.py); the schema refuses just
    those it can see."""
    assert VALIDATOR.is_valid(tomli.loads(path.read_text())) == (path.stem not in SCHEMA_SEES)


def test_schema_describes_the_new_keys():
    model = recipe_schema()["properties"]["model"]["properties"]
    assert "python" in model["kind"]["enum"] and "module" in model["init"]["enum"]
    assert model["args"]["type"] == "object" and model["args"]["default"] == {}
    doc = tomli.loads((ROOT / "recipes" / "own_network.toml").read_text())
    assert not list(VALIDATOR.iter_errors(doc))
    doc["factors"]["model.args.dropout"] = [0.1, [0.2, [0.3]]]  # lists may nest
    assert VALIDATOR.is_valid(doc)
    doc["factors"]["model.args.dropout"] = [{"p": 0.1}]
    assert not VALIDATOR.is_valid(doc)
    doc["factors"].pop("model.args.dropout")
    doc["exclude"] = [{"model.args.hidden": 1}]
    assert VALIDATOR.is_valid(doc)


def test_a_python_file_must_sit_in_the_recipes_folder(tmp_path):
    from runner.recipe.module_file import read_module

    (tmp_path / "study").mkdir()
    (tmp_path / "net.py").write_text("x = 1\n")
    for given in ("../net.py", str(tmp_path / "net.py"), "study/../../net.py"):
        with pytest.raises(RecipeError, match="outside the recipe's folder"):
            read_module(given, tmp_path / "study")
    (tmp_path / "study" / "net.py").write_text("x = 2\n")
    assert read_module(str(tmp_path / "study" / "net.py"), tmp_path / "study").source == "x = 2\n"
