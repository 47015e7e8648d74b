"""`recipe run`: train what is not stored yet, then print the leaderboard."""

from __future__ import annotations

import math
import sys

import click

from runner.cli.common import checked_on, fail, format_option, own_networks, store_option, store_path
from runner.cli.stops import exit_status, stop_on_signals
from runner.errors import UserError


@click.command()
@click.argument("recipe_path", metavar="RECIPE", type=click.Path())
@store_option
@click.option(
    "--workers",
    type=click.IntRange(1, 4096),
    default=None,
    help="Worker processes (default: the number of cores; 1 runs in this process).",
)
@click.option(
    "--threads",
    type=click.IntRange(1, 256),
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
    callback=lambda ctx, param, value: _finite(value),
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
    stop_on_signals()
    # A runner killed outright leaves its semaphores to multiprocessing's resource tracker,
    # which removes them and would print a warning about it on the user's terminal.
    sys.warnoptions.append("ignore::UserWarning:multiprocessing.resource_tracker")
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
    except KeyboardInterrupt as exc:  # before training started, or after every result was stored
        click.echo("\nInterrupted; every finished job is in the store. Run the same command again to go on.", err=True)
        sys.exit(exit_status(exc))


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
    from runner.recipe.loader import load_recipe

    try:
        recipe = load_recipe(recipe_path)  # no torch needed to validate it
        on = checked_on(on)
    except UserError as err:
        fail(err)
    # Nothing here imports torch: a run with nothing to train never does, and a run with
    # workers leaves it to them (their fork server starts once the plan asks for workers).
    from runner.datasets.feasibility import check_grid_splits
    from runner.evidence.leaderboard import leaderboard
    from runner.execution.planning import plan
    from runner.execution.session import Training, check_retry
    from runner.outputs.mlflow_export import RunLogger
    from runner.outputs.text import render
    from runner.recipe.grid import expand

    db = lock = None
    try:
        grid = expand(recipe)
        check_retry(grid, retry_failed)  # before the store is opened or --fresh deletes anything
        check_grid_splits(grid)  # every split the jobs will make, before any job trains
        for line in own_networks(grid):
            if not quiet:
                click.echo(line, err=True)
        # the lock is held from before --fresh deletes anything and before the plan is shown
        db, lock = _open_for_run(store_path(recipe, store))
        if lock is None:
            _read_only_run(db, grid, fresh, retry_failed, quiet, fmt)
            return
        # made before the plan is shown, so a cluster that cannot be reached is refused first
        train = Training(grid, db, on, workers, threads, max_attempts, time_limit, not no_stack)
        train.tracker = tracker = RunLogger(mlflow_uri or recipe.tracking.mlflow, grid, db)
        if fresh:
            _confirm_fresh(db, grid, yes)
        todo = plan(grid, db, retry_failed)
        if not quiet:
            click.echo(_summary(grid, db, todo), err=True)
        if todo.to_run:
            try:
                note = None if quiet else (lambda text: click.echo(text, err=True))
                train.run(todo.to_run, _progress_for(grid, quiet, verbose), note)
            except KeyboardInterrupt as exc:
                tracker.interrupted()
                _interrupted(db, grid, todo, exc)
        _report_tracking(tracker.finish(), tracker.uri, recipe_path, quiet)
        doc = leaderboard(grid, db)
        _retain(grid, db, doc, recipe.run.keep_weights, quiet)
        click.echo(render(doc, fmt or "table"), nl=False)
    except UserError as err:
        if db is not None:
            db.remove_if_unused()  # a run refused before its first result leaves no empty store
        fail(err)
    finally:
        if lock is not None:
            lock.release()
        if db is not None:
            db.close()


def _progress_for(grid, quiet: bool, verbose: bool):
    """Progress lines for a run (or a race's round) of n jobs."""
    from runner.execution.progress import Progress

    def make(n: int) -> Progress:
        return Progress(n, grid.rank_by, grid.goal, quiet=quiet, live=False if verbose else None, verbose=verbose)

    return make


def _interrupted(db, grid, todo, exc) -> None:
    done = len(db.finished_keys() & {j.key for j in grid})
    click.echo(
        f"\nInterrupted: {done} of {todo.total} jobs are stored (jobs still in training are "
        f"not: a stacked group's results are stored when the group ends). Run the same "
        f"command again to resume; finished jobs are not repeated.",
        err=True,
    )
    sys.exit(exit_status(exc))


def _open_for_run(path):
    """(the store, its runner lock, already held): taken before anything is planned, printed
    or deleted. (a read-only Store, None) when the store exists but cannot be written."""
    from runner.store import RunnerLock, Store, StoreReadOnly

    try:
        db = Store(path)
    except StoreReadOnly:
        if not path.exists():
            raise
        return Store(path, create=False), None
    lock = RunnerLock(db)
    try:
        lock.acquire()
    except StoreReadOnly:
        db.close()
        return Store(path, create=False), None
    except BaseException:
        if not db.remove_if_unused():
            db.close()
        raise
    return db, lock


def _read_only_run(db, grid, fresh: bool, retry_failed: bool, quiet: bool, fmt) -> None:
    """A store that cannot be written serves a run that has nothing to train: the board."""
    from runner.evidence.leaderboard import leaderboard
    from runner.execution.planning import plan
    from runner.outputs.text import render
    from runner.store import StoreReadOnly

    todo = plan(grid, db, retry_failed)
    if fresh or todo.to_run:
        raise StoreReadOnly(
            "the store cannot be written: its file, folder or disk is read-only",
            where=str(db.path),
            value=f"{len(todo.to_run)} jobs to run" if not fresh else "--fresh",
            hint="Make it writable, or give this run another --store",
        )
    if not quiet:
        click.echo(todo.summary_line() + " (the store is read-only)", err=True)
    click.echo(render(leaderboard(grid, db), fmt or "table"), nl=False)


def _finite(seconds: float | None) -> float | None:
    if seconds is not None and not math.isfinite(seconds):
        raise click.BadParameter(f"{seconds} is not a finite number of seconds")
    return seconds


def _retain(grid, db, doc, keep: str, quiet: bool) -> None:
    """Apply [run] keep_weights to the stored weights and say what is kept."""
    from runner.execution.retention import retain

    retained = retain(grid, db, doc, keep)
    if not quiet and (retained.jobs or retained.dropped):
        click.echo(retained.describe(), err=True)


def _summary(grid, db, todo) -> str:
    if grid.recipe.adaptive is None:
        return todo.summary_line()
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
