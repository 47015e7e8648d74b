"""user_module: a user's own nn.Module (model.kind = "python") from a file beside the recipe.

The consistency check: the tool's MLP and CNN written by hand as user modules
(tests/data/networks/nets.py) give bitwise the same stored numbers as model.kind = "mlp" and
"cnn" with the same settings, on the single path, across optimizers, L1/L2/weight decay,
dropout, clipping and early stopping. Outside references: torch.nn.init's initializers with
the same generator, torch autograd for the per-layer gradient norms, inverted dropout's
1/(1-p) scaling (Srivastava et al. 2014)."""

import json
import sqlite3

import numpy as np
import pytest
import torch
from conftest import DATA, invoke, stored_metrics, write_recipe
from torch import nn

from runner.errors import UserError
from runner.recipe.grid import expand
from runner.recipe.loader import load_recipe
from runner.recipe.module_file import read_module
from runner.store.database import Store
from runner.training import diagnostics
from runner.training.loop import train_job
from runner.training.models import Dropout, build_model, layers_with_weights, weight_tensors
from runner.training.streams import streams
from runner.training.user_module import check_user_modules, rebuild_network

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
    # both on the single path (the tool's CNN stacks by default, to float rounding of it)
    assert invoke("run", tmp_path / "t.toml", "--store", b, "--workers", 1, "--no-stack", "-q").exit_code == 0
    ours = _stored(a)
    assert len(ours[0]) == 3 * 9  # train, val and test: 3 metrics each
    assert ours == _stored(b)


def _grid(folder, model: str, extra: str = "", source: str = "iris"):
    _copy_networks(folder)
    text = f'name = "g"\nseeds = [1, 2]\n[data]\nsource = "{source}"\n[model]\n{model}\n[train]\nepochs = 2\n{extra}'
    return expand(load_recipe(write_recipe(folder, text)))


def _net(grid, index: int = 0):
    """Job ``index``'s network as its job builds it, and the job's (init, shuffle, dropout) streams."""
    job = grid[index]
    ds = grid.datasets[job.config.data_id]
    gens = streams(job.seed)
    n_out = len(ds.classes)
    return build_model(job.config.settings.model, tuple(ds.X.shape[1:]), n_out, gens[0], gens[2], job.config.module)


MIXED = 'kind = "python"\nfile = "nets.py"\nclass_name = "Mixed"\nargs = { n_in = 4, n_out = 3 }'
REVERSED = 'kind = "python"\nfile = "nets.py"\nclass_name = "Reversed"\nargs = { n_in = 4, width = 16, n_out = 3 }'


@pytest.mark.parametrize(
    "init, reference",
    [
        ("glorot_uniform", lambda w, gain, g: nn.init.xavier_uniform_(w, generator=g)),
        ("glorot_normal", lambda w, gain, g: nn.init.xavier_normal_(w, generator=g)),
        ("he_normal", lambda w, gain, g: nn.init.kaiming_normal_(w, nonlinearity=gain, generator=g)),
        ("orthogonal", lambda w, gain, g: nn.init.orthogonal_(w, nn.init.calculate_gain(gain), generator=g)),
    ],
)
def test_linear_and_conv_layers_get_the_initializer_in_forward_order(tmp_path, init, reference):
    """Against torch.nn.init with a generator seeded as the job's init stream: the Linear and
    Conv layers in the order forward calls them, the last one (the output layer) with gain 1
    (torch: nonlinearity "linear"), the others with ReLU's (model.activation); biases zero;
    LayerNorm and a bare parameter keep their own values; a Linear without bias is fine."""
    for model in (MIXED, REVERSED):
        grid = _grid(tmp_path, model + f'\ninit = "{init}"')
        net = _net(grid)
        g = streams(grid[0].seed)[0]
        layers = (
            [net.conv, net.hidden, net.out] if hasattr(net, "conv") else [net.first, net.mid, net.head]
        )  # forward order; Reversed registers them the other way round
        for i, layer in enumerate(layers):
            expected = reference(torch.empty_like(layer.weight), "linear" if i == len(layers) - 1 else "relu", g)
            assert torch.equal(layer.weight, expected), (model, i)
            assert layer.bias is None or not layer.bias.any()
        if hasattr(net, "norm"):
            assert torch.equal(net.norm.weight, torch.ones(8)) and not net.norm.bias.any()
            assert net.scale.item() == 0.5


def test_init_module_keeps_the_networks_own_initialization_seeded_by_the_job(tmp_path):
    """model.init = "module": torch's default Linear init, uniform within 1/sqrt(fan_in)
    (torch.nn.Linear's documented default), drawn under the job's seed."""
    grid = _grid(tmp_path, REVERSED + '\ninit = "module"')
    a, again, other = _net(grid, 0), _net(grid, 0), _net(grid, 1)
    for layer in (a.first, a.mid, a.head):
        bound = 1 / layer.weight.shape[1] ** 0.5
        assert layer.weight.abs().max() <= bound and layer.bias.abs().max() <= bound and layer.bias.any()
    assert all(torch.equal(p, q) for p, q in zip(a.parameters(), again.parameters()))
    assert not torch.equal(a.first.weight, other.first.weight)  # seed 2 differs from seed 1


def test_dropout_layers_draw_from_the_jobs_dropout_stream(tmp_path):
    """nn.Dropout becomes the tool's inverted dropout at the same rate: kept units scaled by
    1/(1-p) (Srivastava et al. 2014; 2.0 for p 0.5), masks from the job's dropout stream,
    identity in eval mode."""
    grid = _grid(
        tmp_path, 'kind = "python"\nfile = "nets.py"\nclass_name = "Dense"\nargs = { widths = [4, 64, 3], p = 0.5 }'
    )
    net = _net(grid)
    drops = [m for m in net.modules() if isinstance(m, nn.Dropout | Dropout)]
    assert len(drops) == 1 and type(drops[0]) is Dropout and drops[0].p == 0.5
    x = torch.ones(32, 64)
    net.train()
    out = drops[0](x)
    reference = torch.empty(32, 64).bernoulli_(0.5, generator=streams(grid[0].seed)[2]) * 2.0
    assert torch.equal(out, reference) and set(out.unique().tolist()) == {0.0, 2.0}
    net.eval()
    assert torch.equal(drops[0](x), x)


def test_penalties_and_weight_decay_act_on_linear_and_conv_weights_only(tmp_path):
    from runner.components.optimizers import split_parameters

    net = _net(_grid(tmp_path, MIXED))
    decay, no_decay = split_parameters(net)
    weights = [net.conv.weight, net.hidden.weight, net.out.weight]
    assert {id(p) for p in decay} == {id(p) for p in weights} == {id(p) for p in weight_tensors(net)}
    assert {id(p) for p in no_decay} == {
        id(p) for p in (net.conv.bias, net.norm.weight, net.norm.bias, net.scale, net.out.bias)
    }
    assert layers_with_weights(net) == [net.conv, net.hidden, net.out]


def test_diagnostics_of_a_user_module_against_torch_autograd(tmp_path):
    """Per-layer weight-gradient norms in forward order (Reversed defines its layers the other
    way round) against torch autograd on the same probe rows; dead ReLU units and saturated
    tanh units counted among each kind's own outputs, by hand."""
    net = _net(_grid(tmp_path, REVERSED))
    with torch.no_grad():
        net.first.bias[:6] = -50.0  # six units that never fire
        net.mid.weight.mul_(40.0)  # tanh units pushed to their bounds
    x = torch.from_numpy(np.random.default_rng(0).normal(size=(64, 4)).astype(np.float32))
    y = torch.arange(64) % 3
    loss_fn = torch.nn.functional.cross_entropy
    init = diagnostics.at_init(net, x, y, loss_fn)
    net.eval()
    loss_fn(net(x), y).backward()
    norms = [float(layer.weight.grad.norm()) for layer in (net.first, net.mid, net.head)]
    net.zero_grad()
    assert init["init_grad_norms"] == pytest.approx(norms, rel=1e-6)
    assert init["grad_ratio"] == pytest.approx(norms[0] / norms[-1], rel=1e-6)
    with torch.no_grad():
        h = torch.relu(net.first(x))
        t = torch.tanh(net.mid(h))
    dead = float((h.amax(dim=0) <= 0).double().mean())
    near = (t - (-1.0) < 0.02) | (1.0 - t < 0.02)  # within 1% of the output range of a bound
    saturated = float((near.float().mean(dim=0) >= 0.9).double().mean())
    end = diagnostics.at_end(net, x, None)
    assert dead >= 6 / 16 and saturated > 0
    assert end == {"dead_fraction": pytest.approx(dead), "saturated_fraction": pytest.approx(saturated)}
    assert init["init_act_mean"] == pytest.approx([float(h.double().mean()), float(t.double().mean())])


def test_check_and_run_say_that_the_file_runs_and_which_class(tmp_path):
    _copy_networks(tmp_path)
    path = write_recipe(
        tmp_path,
        """
        name = "says"
        seeds = [1]
        [data]
        source = "iris"
        [model]
        kind = "python"
        file = "nets.py"
        class_name = "Dense"
        activation = "tanh"
        init = "he_normal"
        hidden = [32]
        [model.args]
        widths = [4, 8, 3]
        [train]
        epochs = 1
    """,
    )
    checked = invoke("check", path, "--no-probe")
    assert "note: your network ignores model.hidden (settings of the tool's own networks)" in checked.stdout
    assert checked.exit_code == 0, checked.stderr
    assert "this recipe runs the code of nets.py (sha256 " in checked.stdout
    assert "Dense(widths=[4, 8, 3]): 67 parameters; 2 Linear/Conv layers initialized" in checked.stdout
    assert "probe batch (4, 4) -> (4, 3)" in checked.stdout
    assert 'caution: Dense(widths=[4, 8, 3]) uses relu but model.activation is "tanh"' in checked.stdout
    ran = invoke("run", path, "--store", tmp_path / "s.sqlite", "--workers", 1)
    assert ran.exit_code == 0 and "this recipe runs the code of nets.py" in ran.stderr
    quiet = invoke("run", path, "--store", tmp_path / "s.sqlite", "--workers", 1, "-q")
    assert quiet.exit_code == 0 and quiet.stderr == ""


ARGS_STUDY = """
    name = "args"
    seeds = [1, 2]
    [data]
    source = "iris"
    [model]
    kind = "python"
    file = "nets.py"
    class_name = "Dense"
    [model.args]
    {args}
    [train]
    epochs = 3
    batch_size = 16
    lr = 0.01
    [factors]
    "model.args.p" = [0.0, 0.25]
"""


def test_constructor_arguments_are_factors_and_their_order_does_not_matter(tmp_path):
    _copy_networks(tmp_path)
    a = expand(
        load_recipe(write_recipe(tmp_path, ARGS_STUDY.format(args="widths = [4, 8, 3]\n    activation = 'tanh'")))
    )
    b = expand(
        load_recipe(write_recipe(tmp_path, ARGS_STUDY.format(args="activation = 'tanh'\n    widths = [4, 8, 3]")))
    )
    assert [j.key for j in a] == [j.key for j in b] and len({j.key for j in a}) == 4
    assert a.configs[1].settings.model.args == (("activation", "tanh"), ("p", 0.25), ("widths", (4, 8, 3)))
    assert a.configs[1].settings.flat()["model.args.p"] == 0.25
    assert a.configs[1].settings.flat()["model.args.widths"] == [4, 8, 3]
    store = tmp_path / "s.sqlite"
    path = write_recipe(tmp_path, ARGS_STUDY.format(args="widths = [4, 8, 3]"))
    result = invoke("run", path, "--store", store, "--workers", 1, "-q", "--format", "json")
    assert result.exit_code == 0, result.stderr
    doc = json.loads(result.stdout)
    assert sorted(r["levels"]["model.args.p"] for r in doc["rows"]) == [0.0, 0.25]
    assert doc["base_settings"]["model.args.widths"] == [4, 8, 3] and doc["base_settings"]["model.kind"] == "python"


# Job keys of recipes/quickstart.toml and recipes/digits_cnn.toml (first and last job) as the
# main branch computed them before model.kind = "python" existed (commit 60fb7ae): a recipe that
# does not use the new settings keeps its keys and so its stored results.
KEYS_BEFORE = {  # computed on main just before user networks were merged (commit 6223729)
    "quickstart": ("0d2fce3f61ce56f7db3ab875", "832660951abda1e4a0e5fc5d"),
    "digits_cnn": ("4be11c8f1fa8a58d6b8e3640", "4f2b07d5bfd4a2d49dd6c7de"),
}


@pytest.mark.parametrize("name", sorted(KEYS_BEFORE))
def test_recipes_without_a_user_network_keep_their_job_keys(name):
    from conftest import ROOT

    grid = expand(load_recipe(ROOT / "recipes" / f"{name}.toml"))
    assert (grid[0].key, grid[-1].key) == KEYS_BEFORE[name]
    assert not {"file", "class_name", "args"} & set(grid.configs[0].settings.identity()["model"])


def test_editing_the_network_file_reruns_its_jobs_and_the_store_keeps_its_source(tmp_path):
    _copy_networks(tmp_path)
    path = write_recipe(tmp_path, ARGS_STUDY.format(args="widths = [4, 8, 3]"))
    store = tmp_path / "s.sqlite"
    assert invoke("run", path, "--store", store, "--workers", 1, "-q").exit_code == 0
    again = invoke("run", path, "--store", store, "--workers", 1)
    assert "4 jobs, 4 done, 0 to run" in again.stderr
    original = (tmp_path / "nets.py").read_bytes()
    (tmp_path / "nets.py").write_bytes(original + b"\n# a comment changes the bytes, so the jobs\n")
    edited = invoke("run", path, "--store", store, "--workers", 1)
    assert "4 jobs, 0 done, 4 to run" in edited.stderr
    (tmp_path / "nets.py").write_bytes(original)
    assert "4 jobs, 4 done, 0 to run" in invoke("run", path, "--store", store, "--workers", 1).stderr
    grid = expand(load_recipe(path))
    with Store(store) as db:
        kept = db.job_module(grid[1].key)
        assert db.job_module("no such job") is None
    assert kept.file == "nets.py" and kept.class_name == "Dense"
    assert kept.args == {"p": 0.0, "widths": [4, 8, 3]} and kept.source == original.decode()
    assert kept.sha256 == __import__("hashlib").sha256(original).hexdigest()
    # what an export needs: the network rebuilt from the stored record alone takes the trained
    # weights and gives the trained network's outputs
    job = grid[1]
    net, result = train_job(job.spec(), grid.datasets[job.config.data_id], keep_model=True)
    rebuilt = rebuild_network(kept.file, kept.source, kept.class_name, kept.args)
    rebuilt.load_state_dict(net.state_dict())
    x = torch.from_numpy(grid.datasets[job.config.data_id].X[:16])
    net.eval(), rebuilt.eval()
    assert result.status == "done" and torch.equal(net(x), rebuilt(x))


def test_a_regression_network_returns_batch_by_one_and_learns(tmp_path):
    """diabetes: predicting the training mean gives r2 near 0 (common practice); a fitted
    network does much better, with rmse in the target's units."""
    _copy_networks(tmp_path)
    path = write_recipe(
        tmp_path,
        """
        name = "reg"
        seeds = [3]
        [data]
        source = "diabetes"
        [model]
        kind = "python"
        file = "nets.py"
        class_name = "Dense"
        args = { widths = [10, 32, 1] }
        [train]
        epochs = 60
        lr = 3e-3
    """,
    )
    result = invoke("run", path, "--store", tmp_path / "s.sqlite", "--workers", 1, "-q", "--format", "json")
    assert result.exit_code == 0, result.stderr
    row = json.loads(result.stdout)["rows"][0]
    assert row["mean"] < 70  # val rmse; the target runs from 25 to 346
    with sqlite3.connect(tmp_path / "s.sqlite") as c:
        (r2,) = c.execute("SELECT value FROM metrics WHERE split = 'val' AND name = 'r2'").fetchone()
    assert r2 > 0.3


def test_from_a_network_file_to_a_board_with_flags(tmp_path):
    """A new user's path through the CLI: check, run, board. Eight sigmoid layers shrink the
    gradient by the sigmoid's derivative (at most 0.25) per layer, so the first layer's
    gradient norm falls below 1e-3 of the last's: flagged; the same depth with ReLU is not."""
    _copy_networks(tmp_path)
    path = write_recipe(
        tmp_path,
        """
        name = "deep"
        seeds = [1, 2]
        [data]
        source = "digits"
        [model]
        kind = "python"
        file = "nets.py"
        class_name = "Dense"
        args = { widths = [64, 32, 32, 32, 32, 32, 32, 32, 32, 10] }
        [train]
        epochs = 1
        [factors]
        "model.args.activation" = ["sigmoid", "relu"]
    """,
    )
    assert invoke("check", path, "--no-probe").exit_code == 0
    assert invoke("run", path, "--workers", 1, "-q").exit_code == 0
    board = invoke("board", path, "--format", "json")
    assert board.exit_code == 0
    flags = {
        r["levels"]["model.args.activation"]: [f["text"] for f in r["flags"]] for r in json.loads(board.stdout)["rows"]
    }
    assert "vanishing gradients" in flags["sigmoid"] and "vanishing gradients" not in flags["relu"]
    text = invoke("board", path).stdout
    assert "vanishing gradients" in text and "model.args.activation" in text


WORKERS_STUDY = """
    name = "away"
    seeds = [1, 2, 3]
    [data]
    source = "wine"
    [model]
    kind = "python"
    file = "nets.py"
    class_name = "Dense"
    args = { widths = [13, 16, 3], p = 0.2 }
    [train]
    epochs = 4
    batch_size = 16
    [factors]
    "train.optimizer" = ["sgd", "adam"]
    "train.patience" = [0, 2]
"""


@pytest.mark.slow
def test_workers_and_dask_rebuild_the_network_from_the_source_the_job_carries(tmp_path):
    """The grid is expanded, then the network file is deleted: forked workers and a real Dask
    LocalCluster on 127.0.0.1 train from the source each job carries, and store bitwise what
    the in-process run stores."""
    distributed = pytest.importorskip("distributed")
    from runner.execution.planning import execute, make_executor

    _copy_networks(tmp_path)
    grid = expand(load_recipe(write_recipe(tmp_path, WORKERS_STUDY)))
    here = tmp_path / "here.sqlite"
    with Store(here) as db:
        execute(grid, db, list(grid), make_executor("local", 1))
    (tmp_path / "nets.py").unlink()
    pool = tmp_path / "pool.sqlite"
    with Store(pool) as db:
        execute(grid, db, list(grid), make_executor("local", 2))
    cluster = distributed.LocalCluster(
        n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1", dashboard_address=None, silence_logs=40
    )
    try:
        on_dask = tmp_path / "dask.sqlite"
        with Store(on_dask) as db:
            address = cluster.scheduler_address.split("://")[1]
            execute(grid, db, list(grid), make_executor(f"dask://{address}", 2))
            assert {r.status for r in db.jobs()} == {"done"} and len(db.jobs()) == 12
    finally:
        cluster.close()
    assert stored_metrics(here) == stored_metrics(pool) == stored_metrics(on_dask)
    assert _stored(here)[1] == _stored(on_dask)[1]


@pytest.mark.slow
def test_a_killed_user_network_job_resumes_from_its_checkpoint_bit_for_bit(tmp_path):
    """The network draws noise in forward from torch's global generator and has dropout; the
    checkpoint keeps both streams, so the resumed job ends where an uninterrupted one ends."""
    import subprocess

    from conftest import PYTHON, subprocess_env

    _copy_networks(tmp_path)
    path = write_recipe(
        tmp_path,
        """
        name = "noisy"
        seeds = [4]
        [data]
        source = "wine"
        [model]
        kind = "python"
        file = "nets.py"
        class_name = "Noisy"
        args = { n_in = 13, n_out = 3 }
        [train]
        epochs = 12
        batch_size = 16
        schedule = "cosine"
        checkpoint_every = 2
    """,
    )
    killed, clean = tmp_path / "k.sqlite", tmp_path / "c.sqlite"
    env = subprocess_env()
    env.update(RECIPE_FAULT="kill@7", RECIPE_FAULT_ONCE=str(tmp_path / "fired"))
    proc = subprocess.run(
        [PYTHON, "-m", "runner", "run", str(path), "--store", str(killed), "--workers", "2", "-q"],
        env=env,
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert proc.returncode == 0, proc.stderr
    assert (tmp_path / "fired").exists()
    assert invoke("run", path, "--store", clean, "--workers", 1, "-q").exit_code == 0
    a, b = _stored(killed), _stored(clean)
    assert a[0] == b[0] and a[1] == b[1]
    assert '"resumed_from_epoch": 6' in a[2][0][2]


@pytest.mark.slow
def test_reading_results_runs_none_of_the_networks_code(tmp_path):
    """board and status hash the file's bytes for the job keys but never import it (nor torch)."""
    import subprocess

    from conftest import PYTHON, subprocess_env

    marker = tmp_path / "imported"
    source = f"open({str(marker)!r}, 'a').write('x')\n" + (NETWORKS / "nets.py").read_text()
    (tmp_path / "nets.py").write_text(source)
    path = write_recipe(tmp_path, ARGS_STUDY.format(args="widths = [4, 8, 3]"))
    assert invoke("run", path, "--workers", 1, "-q").exit_code == 0
    assert marker.exists()
    marker.unlink()
    for command in ("board", "status"):
        code = (
            f"import sys\nfrom runner.cli.app import cli\ntry:\n    cli([{command!r}, {str(path)!r}])\n"
            "except SystemExit as e:\n    print(e.code, 'torch' in sys.modules)"
        )
        proc = subprocess.run([PYTHON, "-c", code], env=subprocess_env(), capture_output=True, text=True)
        assert proc.stdout.split()[-2:] == ["0", "False"], proc.stderr
        assert "4 done" in proc.stdout or "2/2" in proc.stdout
    assert not marker.exists()


def test_a_user_network_leaves_as_a_bundle_that_runs_its_code_only_when_asked(tmp_path):
    """export writes network.py beside the weights; predict refuses to run it unless told
    to, then reproduces the stored accuracies (counted by sklearn.metrics from the file);
    a changed network.py is refused."""
    from sklearn.metrics import accuracy_score

    _copy_networks(tmp_path)
    path = write_recipe(tmp_path, ARGS_STUDY.format(args="widths = [4, 8, 3]"))
    store = tmp_path / "s.sqlite"
    assert invoke("run", path, "--store", store, "--workers", 1, "-q").exit_code == 0
    out = tmp_path / "bundle"
    assert invoke("export", path, "--store", store, "--out", out).exit_code == 0
    assert (out / "network.py").read_text() == (tmp_path / "nets.py").read_text()
    preds = tmp_path / "p.csv"
    refused = invoke("predict", out, "iris", "--out", preds)
    assert refused.exit_code == 2 and "--run-code" in refused.stderr and not preds.exists()
    ran = invoke("predict", out, "iris", "--out", preds, "--run-code")
    assert ran.exit_code == 0, ran.stderr
    desc = json.loads((out / "model.json").read_text())
    import csv

    with open(preds, newline="") as f:
        rows = list(csv.DictReader(f))
    for split in ("val", "test"):
        part = [r for r in rows if r["split"] == split]
        got = accuracy_score([r["target"] for r in part], [r["predicted"] for r in part])
        assert got == desc["metrics"][split]["accuracy"]
    (out / "network.py").write_text((out / "network.py").read_text() + "\n# edited\n")
    damaged = invoke("predict", out, "iris", "--out", preds, "--run-code")
    assert damaged.exit_code == 2 and "does not match the description" in damaged.stderr
