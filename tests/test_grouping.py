"""grouping: a stacked member's numbers do not depend on its group, so groups are formed
from what is left to run and a resumed or extended grid trains only its missing jobs."""

import json
import sqlite3

import pytest
from conftest import invoke, stored_metrics, write_recipe

BASE = """
name = "{name}"
seeds = {seeds}
[data]
source = "{source}"
[model]
hidden = [17, 9]
activation = "{activation}"
batch_norm = {batch_norm}
dropout = 0.1
[train]
optimizer = "adam"
lr = 3e-3
l2 = 1e-4
clip_norm = 1.0
batch_size = 13
epochs = 3
{factors}
"""

# The job under test: lr 3e-3, adam, seed 3. Alone (a group of one); first in a group of 16
# whose next member is also Adam at the same rate (torch's fused Adam once stepped such a
# run of members as one buffer); last in a group of 6.
PLACES = {
    "alone": ("[3]", ""),
    "first of 16": (
        "[3, 1]",
        '[factors]\n"train.lr" = [3e-3, 1e-3, 1e-2, 3e-2]\n"train.optimizer" = ["adam", "adamw"]',
    ),
    "last of 6": ("[5, 3]", '[factors]\n"train.lr" = [1e-2, 2e-2, 3e-3]'),
}


def _everything(store, key: str) -> dict:
    """Every number stored for one job: metrics, curves, diagnostics (but the group size)."""
    with sqlite3.connect(store) as c:
        (diag,) = c.execute("SELECT diagnostics FROM jobs WHERE key = ?", (key,)).fetchone()
        metrics = sorted(c.execute("SELECT split, name, value FROM metrics WHERE job_key = ?", (key,)))
        curves = sorted(c.execute("SELECT name, epoch, value FROM curves WHERE job_key = ?", (key,)))
    diagnostics = json.loads(diag)
    return {"group": diagnostics.pop("stacked"), "diagnostics": diagnostics, "metrics": metrics, "curves": curves}


def _key_alone(store) -> str:
    with sqlite3.connect(store) as c:
        (key,) = c.execute("SELECT key FROM jobs").fetchone()
    return key


@pytest.mark.parametrize(
    ("source", "activation", "batch_norm"),
    [("wine", "tanh", "false"), ("diabetes", "gelu", "false"), ("wine", "elu", "true")],
)
def test_a_member_trains_to_the_same_bits_alone_and_in_two_groups(tmp_path, source, activation, batch_norm):
    """One job stored three times, alone and in two different stacked groups: every stored
    number equal, bit for bit (float equality; NaN never appears here)."""
    found = {}
    for place, (seeds, factors) in PLACES.items():
        text = BASE.format(
            name="place", seeds=seeds, source=source, activation=activation, batch_norm=batch_norm, factors=factors
        )
        path = write_recipe(tmp_path, text, name=f"{len(found)}.toml")
        store = tmp_path / f"{len(found)}.sqlite"
        result = invoke("run", path, "--store", store, "--workers", 1, "-q")
        assert result.exit_code == 0, result.stderr
        key = _key_alone(store) if place == "alone" else found["alone"][0]
        found[place] = (key, _everything(store, key))
    numbers = {place: stored for place, (_, stored) in found.items()}
    assert [n["group"] for n in numbers.values()] == [1, 16, 6]
    for place in ("first of 16", "last of 6"):
        for part in ("metrics", "curves", "diagnostics"):
            assert numbers[place][part] == numbers["alone"][part], (place, part)
    assert len(numbers["alone"]["curves"]) >= 4 * 3 and len(numbers["alone"]["metrics"]) >= 5


EXTEND = """
name = "extend"
seeds = {seeds}
[data]
source = "iris"
[model]
hidden = [12]
[train]
epochs = 4
batch_size = 16
[factors]
"train.lr" = [1e-3, 1e-2]
"train.optimizer" = ["sgd", "adam"]
"""


def _finished(store) -> dict:
    with sqlite3.connect(store) as c:
        return dict(c.execute("SELECT key, finished FROM jobs"))


def _curves(store) -> list:
    with sqlite3.connect(store) as c:
        return sorted(
            c.execute(
                "SELECT j.seed, j.levels, c.name, c.epoch, c.value FROM curves c JOIN jobs j ON j.key = c.job_key"
            )
        )


def test_extending_seeds_trains_only_the_new_jobs_and_equals_a_run_from_scratch(tmp_path):
    three = write_recipe(tmp_path, EXTEND.format(seeds="[1, 2, 3]"), name="three.toml")
    five = write_recipe(tmp_path, EXTEND.format(seeds="[1, 2, 3, 4, 5]"), name="five.toml")
    store, scratch = tmp_path / "s.sqlite", tmp_path / "scratch.sqlite"
    assert invoke("run", three, "--store", store, "--workers", 1, "-q").exit_code == 0
    before = _finished(store)
    extended = invoke("run", five, "--store", store, "--workers", 1)
    assert extended.exit_code == 0, extended.stderr
    assert "20 jobs, 12 done, 8 to run" in extended.stderr
    assert "training 1 stacked group of 8 jobs" in extended.stderr  # the new jobs only
    after = _finished(store)
    assert len(after) == 20 and all(after[k] == before[k] for k in before), "a stored job was trained again"
    with sqlite3.connect(store) as c:
        groups = [json.loads(d)["stacked"] for (d,) in c.execute("SELECT diagnostics FROM jobs WHERE seed > 3")]
    assert groups == [8] * 8
    assert invoke("run", five, "--store", scratch, "--workers", 1, "-q").exit_code == 0
    assert stored_metrics(store) == stored_metrics(scratch)  # bit for bit
    assert _curves(store) == _curves(scratch)


USER_NETWORK = """
name = "extend"
seeds = SEEDS
[data]
source = "digits"
[model]
MODEL
[train]
epochs = 2
batch_size = 32
LR
"""


_USER = 'kind = "python"\nfile = "nets.py"\n'


@pytest.mark.parametrize(
    "model",
    [
        _USER + 'class_name = "Dense"\nargs = { widths = [64, 32, 10], p = 0.2, input_p = 0.1 }',
        _USER + 'class_name = "Dense"\nargs = { widths = [64, 32, 10], batch_norm = true }',
        _USER + 'class_name = "Conv"\nargs = { channels = [4, 8], hidden = [16], classes = 10 }',
        _USER + 'class_name = "Conv"\nargs = { channels = [4, 8], hidden = [16], classes = 10, batch_norm = true }',
        'kind = "cnn"\nchannels = [4, 8]\nhidden = [16]\ndropout = 0.1\ninit = "he_normal"',
        'kind = "cnn"\nchannels = [4, 8]\nhidden = [16]\nbatch_norm = true',
    ],
    ids=["user-mlp", "user-batch-norm", "user-cnn", "user-cnn-batch-norm", "tool-cnn", "tool-cnn-batch-norm"],
)
def test_a_network_stacked_through_torch_func_trained_alone_or_extended_equals_a_run_from_scratch(tmp_path, model):
    # users' networks and the tool's CNN stack through torch.func (stacked_modules.py), and
    # groups are formed from what is left to run: a job trained alone (a group of one, which
    # vmap batches through other convolution kernels unless the backend runs it as two
    # copies), then three more in a group of three, must store what a group of four stores
    from conftest import DATA

    (tmp_path / "nets.py").write_text((DATA / "networks" / "nets.py").read_text())
    text = USER_NETWORK.replace("MODEL", model)
    lone = write_recipe(tmp_path, text.replace("SEEDS", "[1]").replace("LR", "lr = 1e-3"), name="lone.toml")
    grid = text.replace("SEEDS", "[1, 2]").replace("LR", '[factors]\n"train.lr" = [1e-3, 3e-2]')
    full = write_recipe(tmp_path, grid, name="full.toml")
    store, scratch = tmp_path / "s.sqlite", tmp_path / "scratch.sqlite"
    first = invoke("run", lone, "--store", store, "--workers", 1)
    assert first.exit_code == 0 and "1 stacked group of 1 job" in first.stderr, first.stderr
    extended = invoke("run", full, "--store", store, "--workers", 1)
    assert extended.exit_code == 0 and "stacked group of 3 jobs" in extended.stderr, extended.stderr
    assert invoke("run", full, "--store", scratch, "--workers", 1, "-q").exit_code == 0  # one group of 4
    assert _numbers(store) == _numbers(scratch)  # bit for bit


def _numbers(store) -> tuple[list, list]:
    """Every stored curve and metric value by job key (the lone job's labels differ)."""
    with sqlite3.connect(store) as c:
        curves = sorted(c.execute("SELECT job_key, name, epoch, value FROM curves"))
        metrics = sorted(c.execute("SELECT job_key, split, name, value FROM metrics"))
    return curves, metrics
