"""user_module: a user's own nn.Module (model.kind = "python") from a file beside the recipe.

The consistency check: the tool's MLP and CNN written by hand as user modules
(tests/data/networks/nets.py) give bitwise the same stored numbers as model.kind = "mlp" and
"cnn" with the same settings, on the single path, across optimizers, L1/L2/weight decay,
dropout, clipping and early stopping. Outside references: torch.nn.init's initializers with
the same generator, torch autograd for the per-layer gradient norms, inverted dropout's
1/(1-p) scaling (Srivastava et al. 2014)."""

import json
import sqlite3

import pytest
from conftest import DATA, invoke, stored_metrics, write_recipe

from runner.errors import UserError
from runner.recipe.grid import expand
from runner.recipe.loader import load_recipe
from runner.recipe.module_file import read_module
from runner.training.user_module import check_user_modules

NETWORKS = DATA / "networks"

# fixture -> (key named, phrases the one-line message must contain)
BAD = {
    "escape": ("model.file", ["outside the recipe's folder", '"../../conftest.py"', "escape.toml:7"]),
    "absolute": ("model.file", ["outside the recipe's folder", "/usr/lib/python3"]),
    "missing_network": ("model.file", ["file not found", '"absent.py"']),
    "not_python": ("model.file", ["must be a Python file", "ending in .py"]),
    "syntax": ("model.file", ["SyntaxError", "(broken_syntax.py:5)", "syntax.toml:7"]),
    "import_error": ("model.file", ["NameError: name 'nn' is not defined (broken_import.py:3)"]),
    "no_class": ("model.class_name", ['not found in nets.py, got "Dence"', "Conv, Dense, Detached"]),
    "not_module": ("model.class_name", ["is not an nn.Module subclass", "NotANetwork"]),
    "ctor_typo": ("model.args", ["unexpected keyword argument 'widht'", "ctor_typo.toml:9"]),
    "ctor_raises": ("model.args", ["ValueError: depth must be at least 1, got 0 (nets.py:", "Picky(depth=0)"]),
    "wrong_classes": ("model.class_name", ["is shape (4, 2)", "(batch, 3) logits for 3 classes"]),
    "flat_regression": ("model.class_name", ["is shape (4,)", "(batch, 1) for regression"]),
    "detached": ("model.class_name", ["does not depend on its parameters"]),
    "forward_fails": ("model.class_name", ["mat1 and mat2 shapes cannot be multiplied", "(nets.py:"]),
    "dropout_setting": ("model.dropout", ["keep their own rates", "model.args.<name>"]),
    "no_file": ("model.file", ['is required with model.kind = "python"']),
    "unused_file": ("model.file", ['no configuration has model.kind = "python"']),
    "arg_table": ("model.args.widths", ["must be a string, number, boolean or a list of them", ":10:"]),
    "arg_keyword": ("model.args.class", ["is not a Python argument name"]),
    "init_module_mlp": ("model.init", ['"module" only with model.kind = "python"']),
    "factor_arg": ('factors."model.args.p"[1]', ["must be a string, number, boolean"]),
}


def _validate(path):
    grid = expand(load_recipe(path))
    check_user_modules(grid)
    return grid


@pytest.mark.parametrize("name", sorted(BAD))
def test_bad_network_function_level(name):
    key, phrases = BAD[name]
    with pytest.raises(UserError) as info:
        _validate(NETWORKS / f"{name}.toml")
    assert info.value.key == key
    for phrase in phrases:
        assert phrase in info.value.message(), (phrase, info.value.message())


@pytest.mark.parametrize("name", sorted(BAD))
def test_bad_network_cli_one_line_exit_2_no_store(name, tmp_path):
    store = tmp_path / "s.sqlite"
    for command in (["check", "--no-probe"], ["run", "--store", store, "--workers", 1]):
        result = invoke(command[0], NETWORKS / f"{name}.toml", *command[1:])
        assert result.exit_code == 2, result.stderr
        lines = result.stderr.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith(f"error: {name}.toml:"), result.stderr
        assert "Traceback" not in result.stderr
        for phrase in BAD[name][1]:
            assert phrase in lines[0]
    assert not store.exists()


def test_a_symlink_leading_out_of_the_folder_is_refused(tmp_path):
    outside, inside = tmp_path / "outside", tmp_path / "study"
    outside.mkdir()
    inside.mkdir()
    (outside / "net.py").write_text((NETWORKS / "nets.py").read_text())
    (inside / "net.py").symlink_to(outside / "net.py")
    with pytest.raises(UserError, match="outside the recipe's folder"):
        read_module("net.py", inside)
    (inside / "sub").mkdir()
    (inside / "sub" / "net.py").write_text("x = 1\n")
    (inside / "near.py").symlink_to(inside / "sub" / "net.py")  # a symlink that stays inside is fine
    assert read_module("near.py", inside).source == "x = 1\n"
    assert read_module("sub/../sub/net.py", inside).source == "x = 1\n"


def _copy_networks(folder):
    (folder / "nets.py").write_text((NETWORKS / "nets.py").read_text())


USER_MODEL = """
    [model]
    kind = "python"
    file = "nets.py"
    class_name = "Dense"
    [model.args]
    widths = [13, 32, 16, 3]
    p = 0.3
    input_p = 0.1
"""
TOOL_MODEL = """
    [model]
    hidden = [32, 16]
    dropout = 0.3
    input_dropout = 0.1
"""
TRAIN = """
    [train]
    epochs = 6
    batch_size = 16
    l2 = 1e-3
    weight_decay = 1e-3
    clip_norm = 2.0
    patience = 2
"""
OPTIMIZERS = """
    lr = 0.01
    l1 = 1e-4
    [factors]
    "train.optimizer" = ["sgd", "momentum", "nesterov", "adam", "adamw", "rmsprop", "adagrad"]
"""


def _pair(folder, train: str) -> tuple:
    """The same study with the hand-written MLP and with the tool's: two recipe files."""
    _copy_networks(folder)
    head = '    name = "{}"\n    seeds = [1, 2]\n    [data]\n    source = "wine"\n'
    user = write_recipe(folder, head.format("user") + USER_MODEL + TRAIN + train, "user.toml")
    tool = write_recipe(folder, head.format("tool") + TOOL_MODEL + TRAIN + train, "tool.toml")
    return user, tool


def _stored(store) -> tuple[list, list, list]:
    with sqlite3.connect(store) as c:
        curves = sorted(
            c.execute(
                "SELECT j.seed, j.levels, k.name, k.epoch, k.value FROM curves k JOIN jobs j ON j.key = k.job_key"
            )
        )
        diags = sorted(c.execute("SELECT seed, levels, diagnostics, epochs_run, best_epoch FROM jobs"))
    return stored_metrics(store), curves, diags


def test_an_mlp_written_as_a_user_module_gives_bitwise_the_tools_numbers(tmp_path):
    """Every optimizer, L1 (penalty), L2, weight decay, clipping, input and hidden dropout
    and early stopping: the same stored metrics, curves and diagnostics, bit for bit."""
    user, tool = _pair(tmp_path, OPTIMIZERS)
    a, b = tmp_path / "a.sqlite", tmp_path / "b.sqlite"
    assert invoke("run", user, "--store", a, "--workers", 1, "--no-stack", "-q").exit_code == 0
    assert invoke("run", tool, "--store", b, "--workers", 1, "--no-stack", "-q").exit_code == 0
    ours, theirs = _stored(a), _stored(b)
    assert len(ours[0]) > 7 * 2 * 5 and ours == theirs
    assert any(r[3] < 6 for r in ours[2]), "early stopping stopped some job"


def test_proximal_l1_on_a_user_module_gives_exact_zeros_as_the_tools_mlp(tmp_path):
    user, tool = _pair(tmp_path, '    l1_mode = "proximal"\n    l1 = 0.05\n    optimizer = "sgd"\n    lr = 0.1\n')
    a, b = tmp_path / "a.sqlite", tmp_path / "b.sqlite"
    assert invoke("run", user, "--store", a, "--workers", 1, "--no-stack", "-q").exit_code == 0
    assert invoke("run", tool, "--store", b, "--workers", 1, "--no-stack", "-q").exit_code == 0
    assert _stored(a) == _stored(b)
    zeros = [json.loads(d)["zero_fraction"] for _, _, d, _, _ in _stored(a)[2]]
    assert min(zeros) > 0  # soft-thresholding gives exact zeros (Beck & Teboulle 2009)


def _recipe(name: str, model: str, common: str) -> str:
    return f'name = "{name}"\nseeds = [1]\n[data]\nsource = "digits"\n[model]\n{model}\n{common}'


def test_a_cnn_written_as_a_user_module_gives_bitwise_the_tools_numbers(tmp_path):
    """Images reach the module as (batch, 1, 8, 8); its Conv2d and Linear layers are
    initialized as the tool's CNN's, for three initializers."""
    _copy_networks(tmp_path)
    common = (
        '[train]\nepochs = 2\nbatch_size = 64\nlr = 3e-3\n[factors]\n"model.init" = ["glorot_uniform", "he_normal", '
        '"orthogonal"]\n'
    )
    user = 'kind = "python"\nfile = "nets.py"\nclass_name = "Conv"\n'
    user += "args = { channels = [4, 8], hidden = [16], classes = 10 }"
    tool = 'kind = "cnn"\nchannels = [4, 8]\nhidden = [16]'
    (tmp_path / "u.toml").write_text(_recipe("u", user, common))
    (tmp_path / "t.toml").write_text(_recipe("t", tool, common))
    a, b = tmp_path / "a.sqlite", tmp_path / "b.sqlite"
    assert invoke("run", tmp_path / "u.toml", "--store", a, "--workers", 1, "--no-stack", "-q").exit_code == 0
    assert invoke("run", tmp_path / "t.toml", "--store", b, "--workers", 1, "-q").exit_code == 0
    ours = _stored(a)
    assert len(ours[0]) == 3 * 7  # val and test: 3 metrics each; train: the monitored one
    assert ours == _stored(b)
