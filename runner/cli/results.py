"""Commands that read stored results: board, status, diff, report, export-mlflow."""

from __future__ import annotations

import sys
from pathlib import Path

import click

from runner.cli.common import fail, format_option, load_grid, store_option, store_path
from runner.errors import UserError
from runner.files import write_output
from runner.recipe.loader import check_rank_by


@click.command()
@click.argument("recipe_path", metavar="RECIPE", type=click.Path())
@store_option
@format_option
@click.option("--out", type=click.Path(), help="Write to this file instead of stdout.")
@click.option(
    "--ablation",
    is_flag=True,
    help="Add the ablation tables (main effects, interactions, regularization and optimizer views).",
)
@click.option(
    "--rank-by",
    default=None,
    metavar="val.METRIC",
    help="Rank the stored results on another validation metric (no retraining).",
)
@click.option(
    "--margin",
    type=click.FloatRange(0),
    default=None,
    help="Practical-equivalence margin in the metric's units (overrides [verdicts] margin; 0 = off).",
)
def board(recipe_path, store, fmt, out, ablation, rank_by, margin):
    """Print the leaderboard of RECIPE from its store, without training."""
    try:
        recipe, grid = load_grid(recipe_path)
        from runner.evidence.leaderboard import leaderboard
        from runner.outputs.text import render, render_ablation
        from runner.store.database import Store

        if rank_by is not None:
            grid = grid.with_rank_by(check_rank_by(rank_by, "--rank-by"))
        with Store(store_path(recipe, store), create=False) as db:
            doc = leaderboard(grid, db, margin=margin)
        fmt = fmt or "table"
        text = render(doc, fmt)
        if ablation and fmt in ("table", "markdown"):
            text += render_ablation(doc.ablation, markdown=fmt == "markdown")
        if out:
            write_output(out, text)
    except UserError as err:
        fail(err)
    if not out:
        click.echo(text, nl=False)


@click.command()
@click.argument("recipe_path", metavar="RECIPE", type=click.Path())
@store_option
def status(recipe_path, store):
    """Count RECIPE's jobs by state: done, diverged, failed, timed out, pending."""
    try:
        recipe, grid = load_grid(recipe_path)
        from runner.store.database import Store
        from runner.training.job import Status

        path = store_path(recipe, store)
        keys = {j.key for j in grid}
        counts = dict.fromkeys(Status, 0)
        running = set()
        if path.exists():
            with Store(path, create=False) as db:
                for row in db.jobs(keys):
                    counts[row.status] += 1
                running = db.running_keys() & keys
    except UserError as err:
        fail(err)
    pending = len(keys) - sum(counts.values()) - len(running)
    click.echo(
        f"{len(keys)} jobs: {counts[Status.DONE]} done, {len(running)} running, {pending} pending, "
        f"{counts[Status.FAILED]} failed, {counts[Status.DIVERGED]} diverged, "
        f"{counts[Status.TIMEOUT]} timed out"
    )


@click.command()
@click.argument("old", type=click.Path())
@click.argument("new", type=click.Path())
@click.option("--format", "fmt", type=click.Choice(["table", "markdown", "json"]), default="table", show_default=True)
@click.option(
    "--fail-on-worse",
    is_flag=True,
    help="Exit 1 when any configuration regressed (Holm-corrected across configurations).",
)
@click.option(
    "--min-change",
    type=click.FloatRange(0),
    default=0.0,
    show_default=True,
    help="Smallest change worth a verdict, in the metric's units (0: any change).",
)
@click.option("--alpha", type=click.FloatRange(0, 0.5, min_open=True, max_open=True), default=0.05, show_default=True,
              help="Level of the verdicts: the chance of any false alarm across configurations.")  # fmt: skip
def diff(old, new, fmt, fail_on_worse, min_change, alpha):
    """Compare two leaderboards: OLD and NEW are JSON exports, stores, or recipes."""
    from runner.evidence.diff import diff as compare
    from runner.evidence.diff import load_board, render_diff

    try:
        result = compare(load_board(old), load_board(new), alpha=alpha, min_change=min_change)
    except UserError as err:
        fail(err)
    click.echo(render_diff(result, fmt), nl=False)
    if fail_on_worse and result.failed:
        sys.exit(1)


@click.command()
@click.argument("recipe_path", metavar="RECIPE", type=click.Path())
@store_option
@click.option(
    "--out",
    type=click.Path(),
    default=None,
    help="HTML file to write (default: <name>-report.html beside the store).",
)
def report(recipe_path, store, out):
    """Write a self-contained HTML report of RECIPE's stored results."""
    try:
        recipe, grid = load_grid(recipe_path)
        from runner.outputs.html_report import build_report
        from runner.store.database import Store

        path = store_path(recipe, store)
        with Store(path, create=False) as db:
            text = build_report(grid, db)
        target = Path(out) if out else path.with_name(f"{recipe.name}-report.html")
        write_output(target, text)
    except UserError as err:
        fail(err)
    click.echo(f"wrote {target}")


@click.command("export-mlflow")
@click.argument("recipe_path", metavar="RECIPE", type=click.Path())
@store_option
@click.option("--uri", required=True, help="MLflow tracking URI, e.g. sqlite:///mlflow.db.")
def export_mlflow(recipe_path, store, uri):
    """Log RECIPE's stored jobs to MLflow; jobs already there are skipped, so it can be retried."""
    try:
        recipe, grid = load_grid(recipe_path)
        from runner.outputs.mlflow_export import export_all
        from runner.store import RunnerLock
        from runner.store.database import Store

        # it writes to the store (what reached which URI): one writer at a time, as for a run
        with (
            Store(store_path(recipe, store), create=False, writable=True) as db,
            RunnerLock(db, "recipe export-mlflow"),
        ):
            sent, before, errors = export_all(uri, grid, db)
    except UserError as err:
        fail(err)
    click.echo(f"{sent} jobs logged to {uri}; {before} were already there.")
    if errors:
        click.echo(
            f"{len(errors)} failed (first: {errors[0][:300]}); nothing was lost: run this again to retry.", err=True
        )
        sys.exit(1)
