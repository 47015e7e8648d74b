import os
import sys
import textwrap
from pathlib import Path

import pytest
from click.testing import CliRunner

from runner.cli.app import cli

ROOT = Path(__file__).resolve().parents[1]
DATA = Path(__file__).resolve().parent / "data"


def invoke(*args):
    """Run the CLI in-process; returns click's Result (exit_code, stdout, stderr)."""
    return CliRunner().invoke(cli, [str(a) for a in args], catch_exceptions=False)


def write_recipe(directory: Path, text: str, name: str = "r.toml") -> Path:
    path = directory / name
    path.write_text(textwrap.dedent(text))
    return path


def subprocess_env() -> dict:
    env = dict(os.environ)
    env["PYTHONPATH"] = str(ROOT) + os.pathsep + env.get("PYTHONPATH", "")
    return env


PYTHON = sys.executable


@pytest.fixture
def tiny_recipe(tmp_path):
    """A fast iris grid: 2 optimizers x 2 seeds, small MLP."""
    return write_recipe(
        tmp_path,
        """
        name = "tiny"
        seeds = [1, 2]
        [data]
        source = "iris"
        [model]
        hidden = [16]
        [train]
        epochs = 5
        batch_size = 16
        lr = 0.01
        [factors]
        "train.optimizer" = ["sgd", "adam"]
    """,
    )


def stored_metrics(store) -> list[tuple]:
    """Every stored final metric as (seed, levels, split, name, value), sorted: two stores
    hold the same numbers exactly when these lists are equal."""
    import sqlite3

    with sqlite3.connect(store) as c:
        return sorted(
            c.execute(
                "SELECT j.seed, j.levels, m.split, m.name, m.value FROM metrics m JOIN jobs j ON j.key = m.job_key"
            )
        )
