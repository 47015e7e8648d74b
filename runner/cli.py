"""The `recipe` command line: parses options and calls the pipeline stages, nothing more."""
from __future__ import annotations

import sys
from pathlib import Path

import click

from .errors import UserError

__all__ = ["main", "cli"]


def _fail(err: UserError) -> None:
    click.echo(f"error: {err.message()}", err=True)
    sys.exit(2)


def _store_path(recipe, store: str | None) -> Path:
    return Path(store) if store else recipe.base_dir / "runs" / f"{recipe.name}.sqlite"


def _load(recipe_path: str):
    from .grid import expand
    from .recipe import load_recipe

    recipe = load_recipe(recipe_path)
    return recipe, expand(recipe)


store_option = click.option("--store", "store", type=click.Path(dir_okay=False),
                            help="Results database (default: runs/<name>.sqlite beside the recipe).")
format_option = click.option("--format", "fmt", type=click.Choice(["table", "markdown", "csv", "json"]),
                             default=None, help="Leaderboard format (default: table).")


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(package_name="recipe-runner")
def cli():
    """Turn a TOML recipe into a seeded, resumable training ablation on the CPU."""


@cli.command()
@click.argument("recipe_path", metavar="RECIPE", type=click.Path())
@store_option
@click.option("--workers", type=click.IntRange(1), default=None,
              help="Worker processes (default: the number of cores; 1 runs in this process).")
@click.option("--threads", type=click.IntRange(1), default=1, show_default=True,
              help="Torch threads per worker; results are bitwise-reproducible for a fixed value.")
@click.option("--retry-failed", is_flag=True, help="Run failed and timed-out jobs again.")
@click.option("--quiet", "-q", is_flag=True, help="No progress lines; print only the leaderboard.")
@format_option
def run(recipe_path, store, workers, threads, retry_failed, quiet, fmt):
    """Train every job of RECIPE that has no stored result, then print the leaderboard."""
    from .jobs import execute, plan
    from .progress import Progress
    from .render import render
    from .schedule import default_workers
    from .store import Store
    from .summary import leaderboard

    try:
        recipe, grid = _load(recipe_path)
        with Store(_store_path(recipe, store)) as db:
            todo = plan(grid, db, retry_failed)
            if not quiet:
                click.echo(todo.describe(), err=True)
            progress = Progress(len(todo.to_run), grid.rank_by, grid.goal, quiet=quiet)
            try:
                execute(grid, db, todo.to_run, workers or default_workers(), threads, progress)
            except KeyboardInterrupt:
                done = len(db.finished_keys() & {j.key for j in grid})
                click.echo(f"\nInterrupted: {done} of {todo.total} jobs are stored. Run the same "
                           f"command again to resume; finished jobs are not repeated.", err=True)
                sys.exit(130)
            click.echo(render(leaderboard(grid, db), fmt or "table"), nl=False)
    except UserError as err:
        _fail(err)


@cli.command()
@click.argument("recipe_path", metavar="RECIPE", type=click.Path())
@store_option
@format_option
@click.option("--out", type=click.Path(dir_okay=False), help="Write to this file instead of stdout.")
@click.option("--ablation", is_flag=True,
              help="Add the ablation tables (main effects, interactions, regularization and optimizer views).")
def board(recipe_path, store, fmt, out, ablation):
    """Print the leaderboard of RECIPE from its store, without training."""
    from .render import render, render_ablation
    from .store import Store
    from .summary import leaderboard

    try:
        recipe, grid = _load(recipe_path)
        with Store(_store_path(recipe, store), create=False) as db:
            doc = leaderboard(grid, db)
        fmt = fmt or "table"
        text = render(doc, fmt)
        if ablation and fmt in ("table", "markdown"):
            text += render_ablation(doc["ablation"], markdown=fmt == "markdown")
    except UserError as err:
        _fail(err)
    if out:
        Path(out).write_text(text)
    else:
        click.echo(text, nl=False)


@cli.command()
@click.argument("recipe_path", metavar="RECIPE", type=click.Path())
@store_option
def status(recipe_path, store):
    """Count RECIPE's jobs by state: done, diverged, failed, timed out, pending."""
    from .store import Store

    try:
        recipe, grid = _load(recipe_path)
        path = _store_path(recipe, store)
        keys = {j.key for j in grid}
        counts = {"done": 0, "diverged": 0, "failed": 0, "timeout": 0}
        if path.exists():
            with Store(path, create=False) as db:
                for row in db.jobs(keys):
                    counts[row["status"]] += 1
    except UserError as err:
        _fail(err)
    pending = len(keys) - sum(counts.values())
    click.echo(f"{len(keys)} jobs: {counts['done']} done, {counts['diverged']} diverged, "
               f"{counts['failed']} failed, {counts['timeout']} timed out, {pending} pending")


@cli.command()
@click.argument("old", type=click.Path())
@click.argument("new", type=click.Path())
@click.option("--format", "fmt", type=click.Choice(["table", "markdown", "json"]), default="table",
              show_default=True)
@click.option("--fail-on-worse", is_flag=True, help="Exit 1 when any configuration got clearly worse.")
def diff(old, new, fmt, fail_on_worse):
    """Compare two leaderboards: OLD and NEW are JSON exports, stores, or recipes."""
    from .diff import diff as compare, load_board, render_diff

    try:
        result = compare(load_board(old), load_board(new))
    except UserError as err:
        _fail(err)
    click.echo(render_diff(result, fmt), nl=False)
    if fail_on_worse and result["summary"]["worse"]:
        sys.exit(1)


def main() -> None:
    cli(prog_name="recipe")
