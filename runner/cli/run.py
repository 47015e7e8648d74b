"""`recipe run`: train what is not stored yet, then print the leaderboard."""

from __future__ import annotations

import sys

import click

from runner.cli.common import fail, format_option, store_option, store_path
from runner.errors import UserError


@click.command()
@click.argument("recipe_path", metavar="RECIPE", type=click.Path())
@store_option
@click.option(
    "--workers",
    type=click.IntRange(1),
    default=None,
    help="Worker processes (default: the number of cores; 1 runs in this process).",
)
@click.option(
    "--threads",
    type=click.IntRange(1),
    default=1,
    show_default=True,
    help="Torch threads per worker; results are bitwise-reproducible for a fixed value.",
)
@click.option(
    "--on",
    "on",
    default=None,
    metavar="WHERE",
    help='Where jobs run: "local" (default), "dask-local", or "dask://HOST:PORT".',
)
@click.option("--retry-failed", is_flag=True, help="Run failed and timed-out jobs again.")
@click.option(
    "--max-attempts",
    type=click.IntRange(1),
    default=2,
    show_default=True,
    help="Tries per job when its worker process dies.",
)
@click.option(
    "--time-limit",
    type=click.FloatRange(0, min_open=True),
    default=None,
    help="Seconds one job may train before it is stopped as timed out.",
)
@click.option(
    "--no-stack",
    is_flag=True,
    help="Train every job on its own instead of stacking same-shaped jobs into one computation.",
)
@click.option("--fresh", is_flag=True, help="Delete this grid's stored results first (asks to confirm).")
@click.option("--yes", "-y", is_flag=True, help="Confirm --fresh without asking.")
@click.option(
    "--mlflow",
    "mlflow_uri",
    default=None,
    metavar="URI",
    help="Also log every finished job to this MLflow tracking URI (e.g. sqlite:///mlflow.db).",
)
@click.option("--quiet", "-q", is_flag=True, help="No progress lines; print only the leaderboard.")
@click.option("--verbose", "-v", is_flag=True, help="A line per job even on a terminal, with failure reasons.")
@format_option
def run(
    recipe_path,
    store,
    workers,
    threads,
    on,
    retry_failed,
    max_attempts,
    time_limit,
    no_stack,
    fresh,
    yes,
    mlflow_uri,
    quiet,
    verbose,
    fmt,
):
    """Train every job of RECIPE that has no stored result, then print the leaderboard."""
    try:
        _run(
            recipe_path,
            store,
            workers,
            threads,
            on,
            retry_failed,
            max_attempts,
            time_limit,
            no_stack,
            fresh,
            yes,
            mlflow_uri,
            quiet,
            verbose,
            fmt,
        )
    except KeyboardInterrupt:  # before training started, or after every result was stored
        click.echo("\nInterrupted; every finished job is in the store. Run the same command again to go on.", err=True)
        sys.exit(130)


def _run(
    recipe_path,
    store,
    workers,
    threads,
    on,
    retry_failed,
    max_attempts,
    time_limit,
    no_stack,
    fresh,
    yes,
    mlflow_uri,
    quiet,
    verbose,
    fmt,
):
    from runner.execution.forkserver import start_early, wants_workers
    from runner.recipe.loader import load_recipe

    try:
        recipe = load_recipe(recipe_path)  # no torch needed to validate it
    except UserError as err:
        fail(err)
    if wants_workers(workers, on, recipe.run):
        start_early()  # its imports overlap with this process's from here on (see forkserver.py)
    from runner.datasets.feasibility import check_grid_splits
    from runner.evidence.leaderboard import leaderboard
    from runner.execution.executors import default_workers
    from runner.execution.planning import execute, make_executor, plan
    from runner.execution.progress import Progress
    from runner.outputs.mlflow_export import RunLogger
    from runner.outputs.text import render
    from runner.recipe.grid import expand
    from runner.store.database import Store

    try:
        grid = expand(recipe)
        check_grid_splits(grid)  # every split the jobs will make, before any job trains
        where = on or recipe.run.on
        workers = workers or recipe.run.workers or default_workers()
        with Store(store_path(recipe, store)) as db:
            if fresh:
                _confirm_fresh(db, grid, yes)
            todo = plan(grid, db, retry_failed)
            if not quiet:
                click.echo(_summary(grid, db, todo, retry_failed), err=True)

            def progress_for(n: int) -> Progress:
                live = False if verbose else None
                return Progress(n, grid.rank_by, grid.goal, quiet=quiet, live=live, verbose=verbose)

            executor = make_executor(where, workers, threads, max_attempts, time_limit)
            tracker = RunLogger(mlflow_uri or recipe.tracking.mlflow, grid, db)
            try:
                if recipe.adaptive is not None:  # seeds on demand: the race's rounds (execution/racing.py)
                    from runner.execution.racing import run_race

                    note = None if quiet else (lambda text: click.echo(text, err=True))
                    run_race(grid, db, executor, progress_for, time_limit, tracker.stored, not no_stack, note)
                else:
                    execute(grid, db, todo.to_run, executor, progress_for(len(todo.to_run)), time_limit,
                            on_stored=tracker.stored, stack=not no_stack)  # fmt: skip
                _report_tracking(tracker.finish(), tracker.uri, recipe_path, quiet)
            except KeyboardInterrupt:
                done = len(db.finished_keys() & {j.key for j in grid})
                click.echo(
                    f"\nInterrupted: {done} of {todo.total} jobs are stored. Run the same "
                    f"command again to resume; finished jobs are not repeated.",
                    err=True,
                )
                sys.exit(130)
            click.echo(render(leaderboard(grid, db), fmt or "table"), nl=False)
    except UserError as err:
        fail(err)


def _summary(grid, db, todo, retry_failed: bool) -> str:
    if grid.recipe.adaptive is None:
        return todo.summary_line()
    if retry_failed:
        raise UserError(
            "--retry-failed cannot be used with [adaptive]: the race has already decided on those jobs",
            key="--retry-failed",
            hint="Start the race over with --fresh, or run without [adaptive]",
        )
    from runner.execution.racing import summary_line

    return summary_line(grid, db)


def _report_tracking(errors, uri, recipe_path, quiet: bool) -> None:
    if errors is None:
        return
    if errors:
        click.echo(
            f"MLflow export to {uri} failed for {len(errors)} job(s) (first: {errors[0][:300]}). "
            f"The results are safe in the store; retry with: recipe export-mlflow {recipe_path} "
            f"--uri {uri}",
            err=True,
        )
    elif not quiet:
        click.echo(f"MLflow: all stored jobs are logged at {uri}", err=True)


def _confirm_fresh(db, grid, yes: bool) -> None:
    from runner.execution.planning import forget

    stored = len(db.finished_keys() & {j.key for j in grid})
    if not yes:
        if not sys.stdin.isatty():
            raise UserError(
                "--fresh would delete stored results and needs confirmation",
                value=f"{stored} stored jobs",
                hint="Add --yes to confirm without a terminal",
            )
        click.confirm(f"Delete the {stored} stored results of this grid and start over?", abort=True, err=True)
    forget(grid, db)
    if grid.recipe.adaptive is not None:
        from runner.evidence.race_board import race_plan

        db.forget_race(race_plan(grid).key())
