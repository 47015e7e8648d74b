"""checkpoint: a job killed part-way resumes from its last checkpoint and ends bit for bit
where an uninterrupted run ends."""

import sqlite3
import subprocess

import pytest
import torch
from conftest import PYTHON, invoke, subprocess_env, write_recipe

from runner.training import checkpoints as checkpoint

RECIPE = """
    name = "ckpt"
    seeds = [4]
    [data]
    source = "wine"
    [model]
    hidden = [32, 32]
    dropout = 0.3
    [train]
    optimizer = "adam"
    epochs = 12
    batch_size = 16
    schedule = "cosine"
    patience = 50
    checkpoint_every = 2
"""


def stored(store):
    with sqlite3.connect(store) as c:
        m = sorted(c.execute("SELECT split, name, value FROM metrics"))
        k = sorted(c.execute("SELECT name, epoch, value FROM curves"))
        d = c.execute("SELECT diagnostics FROM jobs").fetchone()[0]
    return m, k, d


@pytest.mark.slow
def test_killed_job_resumes_from_checkpoint_bit_for_bit(tmp_path):
    path = write_recipe(tmp_path, RECIPE)
    killed, clean = tmp_path / "k.sqlite", tmp_path / "c.sqlite"
    env = subprocess_env()
    env.update(RECIPE_FAULT="kill@7", RECIPE_FAULT_ONCE=str(tmp_path / "fired"))
    # The worker is SIGKILLed at the start of epoch 8 (index 7); the last checkpoint is epoch 6.
    proc = subprocess.run(
        [PYTHON, "-m", "runner", "run", str(path), "--store", str(killed), "--workers", "2", "-q"],
        env=env,
        capture_output=True,
        text=True,
        timeout=180,
    )
    assert proc.returncode == 0, proc.stderr
    assert (tmp_path / "fired").exists()
    assert invoke("run", path, "--store", clean, "--workers", 1, "-q").exit_code == 0
    m1, k1, d1 = stored(killed)
    m2, k2, _ = stored(clean)
    assert m1 == m2 and k1 == k2
    assert '"resumed_from_epoch": 6' in d1
    assert not list((tmp_path / "k.checkpoints").glob("*.pt")), "checkpoints are removed once stored"


def test_checkpoint_file_loads_with_weights_only(tmp_path):
    """Checkpoints hold only tensors and plain values: torch.load(weights_only=True) reads them."""
    state = {
        "model": {"w": torch.ones(2)},
        "rng": torch.Generator().get_state(),
        "curves": {"a": [1.0]},
        "best": None,
        "epoch": 3,
    }
    target = tmp_path / "x.pt"
    checkpoint.save(str(target), state)
    back = torch.load(target, weights_only=True)
    assert back["epoch"] == 3 and torch.equal(back["model"]["w"], torch.ones(2))
    assert checkpoint.load(str(tmp_path / "missing.pt")) is None
