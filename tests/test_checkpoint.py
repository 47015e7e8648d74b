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


def test_a_checkpoint_that_does_not_fit_means_starting_from_scratch(tmp_path):
    """A checkpoint that loads but belongs to another model (other keys, other shapes, fields
    missing) or is not a checkpoint at all costs the job its head start, never its result:
    the job trains from scratch to the same numbers as a clean run and says so."""
    from runner.recipe.grid import expand
    from runner.recipe.loader import load_recipe

    path = write_recipe(tmp_path, RECIPE)
    clean = tmp_path / "c.sqlite"
    assert invoke("run", path, "--store", clean, "--workers", 1, "-q").exit_code == 0
    key = expand(load_recipe(path))[0].key
    unfit = {
        "other keys": {"model": {"bogus": torch.ones(3)}, "epoch": 4, "step": 40},
        "other shapes": {"model": {"1.weight": torch.ones(2, 2)}, "epoch": 4, "step": 40},
        "fields missing": {"epoch": 4},
        "garbage": None,
    }
    for i, (what, state) in enumerate(unfit.items()):
        store = tmp_path / f"u{i}.sqlite"
        target = tmp_path / f"u{i}.checkpoints" / f"{key}.pt"
        if state is None:
            target.parent.mkdir()
            target.write_bytes(b"PK\x03\x04 not a checkpoint")
        else:
            assert checkpoint.save(str(target), state) is None
        result = invoke("run", path, "--store", store, "--workers", 1, "-q")
        assert result.exit_code == 0, (what, result.stderr)
        m1, k1, d1 = stored(store)
        m2, k2, _ = stored(clean)
        assert (m1, k1) == (m2, k2), what
        with sqlite3.connect(store) as c:
            assert c.execute("SELECT status FROM jobs").fetchone()[0] == "done"
        if state is not None:
            assert "did not fit the model" in d1 and "trained from scratch" in d1, (what, d1)
        assert not target.exists(), "the unusable checkpoint is removed"


def test_a_checkpoint_that_cannot_be_written_is_skipped_with_a_note(tmp_path):
    """A file where the checkpoint folder should be (the write fails with ENOTDIR, as it would
    with ENOSPC on a full disk): the job goes on without checkpoints, to the same numbers."""
    path = write_recipe(tmp_path, RECIPE)
    clean, blocked = tmp_path / "c.sqlite", tmp_path / "b.sqlite"
    (tmp_path / "b.checkpoints").write_text("in the way")
    assert invoke("run", path, "--store", clean, "--workers", 1, "-q").exit_code == 0
    result = invoke("run", path, "--store", blocked, "--workers", 1, "-q")
    assert result.exit_code == 0, result.stderr
    m1, k1, d1 = stored(blocked)
    m2, k2, _ = stored(clean)
    assert (m1, k1) == (m2, k2)
    assert d1.count("a checkpoint could not be saved") == 1 and "went on without it" in d1
    assert (tmp_path / "b.checkpoints").read_text() == "in the way"
