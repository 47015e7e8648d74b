"""The `recipe` command line: parses options and calls the pipeline stages, nothing more."""

from __future__ import annotations

import sys
from pathlib import Path

import click

from runner.errors import UserError

__all__ = ["cli", "main"]


def _fail(err: UserError) -> None:
    click.echo(f"error: {err.message()}", err=True)
    sys.exit(2)


def _store_path(recipe, store: str | None) -> Path:
    return Path(store) if store else recipe.base_dir / "runs" / f"{recipe.name}.sqlite"


def _load(recipe_path: str):
    """The validated recipe and its grid. Validation imports nothing heavy, so a recipe's
    error is reported at once; commands import their own heavy modules after this."""
    from runner.recipe.loader import load_recipe

    recipe = load_recipe(recipe_path)
    from runner.recipe.grid import expand

    return recipe, expand(recipe)


store_option = click.option(
    "--store",
    "store",
    type=click.Path(dir_okay=False),
    help="Results database (default: runs/<name>.sqlite beside the recipe).",
)
format_option = click.option(
    "--format",
    "fmt",
    type=click.Choice(["table", "markdown", "csv", "json"]),
    default=None,
    help="Leaderboard format (default: table).",
)


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(package_name="recipe-runner")
def cli():
    """Turn a TOML recipe into a seeded, resumable training ablation on the CPU."""


@cli.command()
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
        _fail(err)
    if wants_workers(workers, on, recipe.run):
        start_early()  # its imports overlap with this process's from here on (see forkserver.py)
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
        where = on or recipe.run.on
        workers = workers or recipe.run.workers or default_workers()
        with Store(_store_path(recipe, store)) as db:
            if fresh:
                _confirm_fresh(db, grid, yes)
            todo = plan(grid, db, retry_failed)
            if not quiet:
                click.echo(todo.describe(), err=True)
            progress = Progress(
                len(todo.to_run), grid.rank_by, grid.goal, quiet=quiet, live=False if verbose else None, verbose=verbose
            )
            executor = make_executor(where, workers, threads, max_attempts, time_limit)
            tracker = RunLogger(mlflow_uri or recipe.tracking.mlflow, grid, db)
            try:
                execute(
                    grid, db, todo.to_run, executor, progress, time_limit, on_stored=tracker.stored, stack=not no_stack
                )
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
        _fail(err)


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


@cli.command()
@click.argument("recipe_path", metavar="RECIPE", type=click.Path())
@store_option
@format_option
@click.option("--out", type=click.Path(dir_okay=False), help="Write to this file instead of stdout.")
@click.option(
    "--ablation",
    is_flag=True,
    help="Add the ablation tables (main effects, interactions, regularization and optimizer views).",
)
def board(recipe_path, store, fmt, out, ablation):
    """Print the leaderboard of RECIPE from its store, without training."""
    try:
        recipe, grid = _load(recipe_path)
        from runner.evidence.leaderboard import leaderboard
        from runner.outputs.text import render, render_ablation
        from runner.store.database import Store

        with Store(_store_path(recipe, store), create=False) as db:
            doc = leaderboard(grid, db)
        fmt = fmt or "table"
        text = render(doc, fmt)
        if ablation and fmt in ("table", "markdown"):
            text += render_ablation(doc.ablation, markdown=fmt == "markdown")
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
    try:
        recipe, grid = _load(recipe_path)
        from runner.store.database import Store
        from runner.training.job import Status

        path = _store_path(recipe, store)
        keys = {j.key for j in grid}
        counts = dict.fromkeys(Status, 0)
        running = set()
        if path.exists():
            with Store(path, create=False) as db:
                for row in db.jobs(keys):
                    counts[row.status] += 1
                running = db.running_keys() & keys
    except UserError as err:
        _fail(err)
    pending = len(keys) - sum(counts.values()) - len(running)
    click.echo(
        f"{len(keys)} jobs: {counts[Status.DONE]} done, {len(running)} running, {pending} pending, "
        f"{counts[Status.FAILED]} failed, {counts[Status.DIVERGED]} diverged, "
        f"{counts[Status.TIMEOUT]} timed out"
    )


@cli.command()
@click.argument("old", type=click.Path())
@click.argument("new", type=click.Path())
@click.option("--format", "fmt", type=click.Choice(["table", "markdown", "json"]), default="table", show_default=True)
@click.option("--fail-on-worse", is_flag=True, help="Exit 1 when any configuration got clearly worse.")
def diff(old, new, fmt, fail_on_worse):
    """Compare two leaderboards: OLD and NEW are JSON exports, stores, or recipes."""
    from runner.evidence.diff import diff as compare
    from runner.evidence.diff import load_board, render_diff

    try:
        result = compare(load_board(old), load_board(new))
    except UserError as err:
        _fail(err)
    click.echo(render_diff(result, fmt), nl=False)
    if fail_on_worse and result.summary["worse"]:
        sys.exit(1)


@cli.command()
@click.argument("recipe_path", metavar="RECIPE", type=click.Path())
@store_option
@click.option(
    "--out",
    type=click.Path(dir_okay=False),
    default=None,
    help="HTML file to write (default: <name>-report.html beside the store).",
)
def report(recipe_path, store, out):
    """Write a self-contained HTML report of RECIPE's stored results."""
    try:
        recipe, grid = _load(recipe_path)
        from runner.outputs.html_report import build_report
        from runner.store.database import Store

        path = _store_path(recipe, store)
        with Store(path, create=False) as db:
            text = build_report(grid, db)
    except UserError as err:
        _fail(err)
    target = Path(out) if out else path.with_name(f"{recipe.name}-report.html")
    target.write_text(text, encoding="utf-8")
    click.echo(f"wrote {target}")


@cli.command("export-mlflow")
@click.argument("recipe_path", metavar="RECIPE", type=click.Path())
@store_option
@click.option("--uri", required=True, help="MLflow tracking URI, e.g. sqlite:///mlflow.db.")
def export_mlflow(recipe_path, store, uri):
    """Log RECIPE's stored jobs to MLflow; jobs already there are skipped, so it can be retried."""
    try:
        recipe, grid = _load(recipe_path)
        from runner.outputs.mlflow_export import export_all
        from runner.store.database import Store

        with Store(_store_path(recipe, store), create=False) as db:
            sent, before, errors = export_all(uri, grid, db)
    except UserError as err:
        _fail(err)
    click.echo(f"{sent} jobs logged to {uri}; {before} were already there.")
    if errors:
        click.echo(
            f"{len(errors)} failed (first: {errors[0][:300]}); nothing was lost: run this again to retry.", err=True
        )
        sys.exit(1)


@cli.command()
@click.argument("recipe_path", metavar="RECIPE", type=click.Path())
@store_option
@click.option("--workers", type=click.IntRange(1), default=None, help="Workers to estimate for (default: cores).")
@click.option("--no-probe", is_flag=True, help="Skip the timed probes (no run-time estimate).")
@click.option("--no-stack", is_flag=True, help="Estimate for `recipe run --no-stack`: every job on its own.")
def check(recipe_path, store, workers, no_probe, no_stack):
    """Validate RECIPE and print its plan: factors, jobs, what is stored, a time estimate."""
    try:
        recipe, grid = _load(recipe_path)
        from runner.execution.estimate import describe_plan
        from runner.execution.executors import default_workers
        from runner.store.database import Store

        path = _store_path(recipe, store)
        workers = workers or recipe.run.workers or default_workers()
        if path.exists():
            with Store(path, create=False) as db:
                text, _ = describe_plan(grid, db, workers, probe=not no_probe, stack=not no_stack)
        else:
            text, _ = describe_plan(grid, None, workers, probe=not no_probe, stack=not no_stack)
    except UserError as err:
        _fail(err)
    click.echo(f"{recipe_path}: valid.")
    click.echo(text, nl=False)


@cli.command()
def schema():
    """Print the JSON Schema of the recipe format (for editors with TOML schema support)."""
    import json

    from runner.recipe.schema import recipe_schema

    click.echo(json.dumps(recipe_schema(), indent=2))


@cli.command()
@click.argument("source")
@click.option(
    "--out",
    type=click.Path(dir_okay=False),
    default=None,
    help="Recipe file to write (default: <data name>.toml here).",
)
@click.option("--target", default=None, help="The target column (default: guessed from the data).")
@click.option("--force", is_flag=True, help="Overwrite an existing file.")
def new(source, out, target, force):
    """Write a commented starter recipe for SOURCE: a CSV or NPZ file, or a bundled data set."""
    from runner.recipe.grid import expand
    from runner.recipe.loader import parse_recipe
    from runner.recipe.starter import starter_recipe

    target_path = Path(out) if out else Path(f"{Path(source).stem}.toml")
    try:
        if target_path.exists() and not force:
            raise UserError("file exists", where=str(target_path), hint="Choose another --out or pass --force")
        text = starter_recipe(source, target_path, target)
        expand(parse_recipe(text, target_path.resolve()))  # never write a starter that does not validate
    except UserError as err:
        _fail(err)
    target_path.write_text(text)
    click.echo(f"wrote {target_path}; next: recipe check {target_path}")


def main() -> None:
    cli(prog_name="recipe")
