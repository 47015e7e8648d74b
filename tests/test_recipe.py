"""recipe: bad input gives one clear message naming the key, exit status 2, and no store."""

import subprocess

import pytest
from conftest import DATA, PYTHON, invoke, subprocess_env, write_recipe

from runner.errors import UserError
from runner.recipe.grid import expand
from runner.recipe.loader import load_recipe

# fixture file -> (key named in the message, phrases the message must contain)
BAD = {
    "unknown_key": ("train.optimiser", ['did you mean "train.optimizer"', ":8:"]),
    "unknown_top": ("trian", ['did you mean "train"']),
    "wrong_type": ("train.lr", ['must be a number, got "fast"']),
    "negative_lr": ("train.lr", ["must be > 0, got -0.1"]),
    "dropout_one": ("model.dropout", ["must be < 1, got 1.0", "[0, 1)"]),
    "batch_zero": ("train.batch_size", ["must be >= 1, got 0", '"full"']),
    "bad_factor_path": ('factors."train.learning_rate"', ["is not a setting that can vary"]),
    "empty_factor": ('factors."train.lr"', ["has no levels"]),
    "missing_target": ("data.target", ['got "specie"', 'Did you mean "species"']),
    "text_feature": (None, ['column "species" is not numeric', "iris_text_feature.csv:3"]),
    "missing_file": ("data.source", ["data file not found", "no_such_file.csv"]),
    "malformed": (None, ["not valid TOML", "malformed.toml:7"]),
    "exclude_all": ("exclude", ["remove every configuration"]),
    "rank_on_test": ("rank_by", ["test score optimistic"]),
    "nesterov_no_momentum": ("train.momentum", ["nesterov needs momentum > 0", "train.optimizer = nesterov"]),
    "wrong_metric_task": ("rank_by", ["rmse is not a classification metric"]),
    "seeds_float": ("seeds", ["must be a whole number", "got 1.0", "without a decimal point"]),
    "deeply_nested": (None, ["deeply_nested.toml", "nested too deeply"]),
    # the estimate (4 bytes x 6 copies of ~5e9 parameters) exceeds any machine this runs on
    "huge_layer": ("model.hidden", ["GB of memory", "more than the", "got [1000000000]"]),
}


@pytest.mark.parametrize("name", sorted(BAD))
def test_bad_recipe_function_level(name):
    """load_recipe + expand raise a UserError whose key and text name the problem."""
    key, phrases = BAD[name]
    with pytest.raises(UserError) as info:
        expand(load_recipe(DATA / f"{name}.toml"))
    err = info.value
    if key:
        assert err.key == key
    for phrase in phrases:
        assert phrase in err.message()


@pytest.mark.parametrize("name", sorted(BAD))
def test_bad_recipe_cli_exit_2_and_no_store(name, tmp_path):
    """Through the CLI: exit 2, the message on stderr, no traceback, nothing written."""
    store = tmp_path / "s.sqlite"
    result = invoke("run", DATA / f"{name}.toml", "--store", store)
    assert result.exit_code == 2
    assert result.stderr.startswith("error: ")
    assert "Traceback" not in result.stderr
    for phrase in BAD[name][1]:
        assert phrase in result.stderr
    assert not store.exists()


@pytest.mark.slow
def test_real_process_exit_status_and_no_traceback(tmp_path):
    """The installed entry point exits 2 with a one-paragraph message."""
    proc = subprocess.run(
        [PYTHON, "-m", "runner", "run", str(DATA / "negative_lr.toml"), "--store", str(tmp_path / "s.sqlite")],
        capture_output=True,
        text=True,
        env=subprocess_env(),
    )
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr
    assert proc.stderr.strip().count("\n") == 0
    assert "train.lr: must be > 0" in proc.stderr


def test_store_untouched_by_bad_edit(tmp_path, tiny_recipe):
    """A bad edit to a recipe that already has results changes nothing in its store."""
    store = tmp_path / "s.sqlite"
    assert invoke("run", tiny_recipe, "--store", store, "--workers", 1, "-q").exit_code == 0
    before = store.read_bytes()
    tiny_recipe.write_text(tiny_recipe.read_text().replace("lr = 0.01", "lr = -1"))
    result = invoke("run", tiny_recipe, "--store", store)
    assert result.exit_code == 2
    assert store.read_bytes() == before


def test_linked_factor_needs_equal_lengths(tmp_path):
    path = write_recipe(
        tmp_path,
        """
        name = "x"
        [data]
        source = "iris"
        [factors.opt]
        "train.optimizer" = ["sgd", "adam"]
        "train.lr" = [0.1]
    """,
    )
    with pytest.raises(UserError, match="equal lengths"):
        load_recipe(path)


def test_exclusion_value_must_be_a_level(tmp_path):
    path = write_recipe(
        tmp_path,
        """
        name = "x"
        [data]
        source = "iris"
        [factors]
        "train.optimizer" = ["sgd", "adam"]
        [[exclude]]
        "train.optimizer" = "adagrad"
    """,
    )
    with pytest.raises(UserError, match="never applies"):
        load_recipe(path)


def test_a_byte_order_mark_is_not_part_of_the_recipe(tmp_path):
    """Editors on some systems start UTF-8 files with a byte-order mark; the recipe reads the same."""
    plain = write_recipe(tmp_path, 'name = "bom"\n[data]\nsource = "iris"\n', "plain.toml")
    marked = tmp_path / "marked.toml"
    marked.write_bytes(b"\xef\xbb\xbf" + plain.read_bytes())
    assert load_recipe(marked).sections == load_recipe(plain).sections
    assert invoke("check", marked, "--no-probe").exit_code == 0


def test_a_huge_value_is_shown_cut_short(tmp_path):
    """An error shows enough of a value to recognise it and says how long it was; a 500 kB
    string does not fill the terminal."""
    path = tmp_path / "long.toml"
    path.write_text('name = "x"\n[data]\nsource = "iris"\n[train]\nlr = "' + "x" * 500_000 + '"\n')
    result = invoke("check", path)
    assert result.exit_code == 2 and "train.lr" in result.stderr and "(500,002 characters)" in result.stderr
    assert len(result.stderr) < 400 and len(result.stderr.strip().splitlines()) == 1
