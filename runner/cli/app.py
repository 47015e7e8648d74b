"""The `recipe` command group: each command parses its options and calls the pipeline's
stages (run.py, results.py, authoring.py); no logic lives only here."""

from __future__ import annotations

import sys

import click

from runner.cli.authoring import check, new, schema
from runner.cli.model import export, predict
from runner.cli.results import board, diff, export_mlflow, report, status
from runner.cli.run import run

__all__ = ["cli", "main"]


class _Group(click.Group):
    """The command group, with click's usage errors (an unknown option, a value out of range)
    given as one line like the tool's own errors, exit status 2."""

    def main(self, *args, standalone_mode: bool = True, **kwargs):
        if not standalone_mode:
            return super().main(*args, standalone_mode=False, **kwargs)
        try:
            rv = super().main(*args, standalone_mode=False, **kwargs)
        except click.UsageError as exc:
            see = f" (see '{exc.ctx.command_path} -h')" if exc.ctx else ""
            click.echo(f"error: {exc.format_message()}{see}", err=True)
            sys.exit(exc.exit_code)
        except click.ClickException as exc:
            exc.show()
            sys.exit(exc.exit_code)
        except click.Abort:
            click.echo("Aborted!", err=True)
            sys.exit(1)
        sys.exit(rv if isinstance(rv, int) else 0)


@click.group(cls=_Group, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(package_name="recipe-runner")
def cli():
    """Turn a TOML recipe into a seeded, resumable training ablation on the CPU."""


for command in (run, board, status, check, report, diff, export_mlflow, export, predict, schema, new):
    cli.add_command(command)


def main() -> None:
    cli(prog_name="recipe")
