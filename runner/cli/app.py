"""The `recipe` command group: each command parses its options and calls the pipeline's
stages (run.py, results.py, authoring.py); no logic lives only here."""

from __future__ import annotations

import click

from runner.cli.authoring import check, new, schema
from runner.cli.model import export, predict
from runner.cli.results import board, diff, export_mlflow, report, status
from runner.cli.run import run

__all__ = ["cli", "main"]


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(package_name="recipe-runner")
def cli():
    """Turn a TOML recipe into a seeded, resumable training ablation on the CPU."""


for command in (run, board, status, check, report, diff, export_mlflow, export, predict, schema, new):
    cli.add_command(command)


def main() -> None:
    cli(prog_name="recipe")
