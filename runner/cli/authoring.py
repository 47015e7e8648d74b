"""Commands that help write a recipe: check, schema, new."""

from __future__ import annotations

from pathlib import Path

import click

from runner.cli.common import fail, load_grid, own_networks, store_option, store_path
from runner.errors import UserError
from runner.files import write_output


@click.command()
@click.argument("recipe_path", metavar="RECIPE", type=click.Path())
@store_option
@click.option("--workers", type=click.IntRange(1), default=None, help="Workers to estimate for (default: cores).")
@click.option("--no-probe", is_flag=True, help="Skip the timed probes (no run-time estimate).")
@click.option("--no-stack", is_flag=True, help="Estimate for `recipe run --no-stack`: every job on its own.")
@click.option("--lr-probe", is_flag=True, help="Run a learning-rate range test for each optimizer the grid uses.")
def check(recipe_path, store, workers, no_probe, no_stack, lr_probe):
    """Validate RECIPE and print its plan: factors, jobs, what is stored, a time estimate."""
    try:
        recipe, grid = load_grid(recipe_path)
        from runner.datasets.feasibility import check_grid_splits

        check_grid_splits(grid)  # every split the run would make, before any probe trains
        networks = own_networks(grid)
        from runner.execution.estimate import plan_report
        from runner.execution.executors import default_workers
        from runner.store.database import Store

        path = store_path(recipe, store)
        workers = workers or recipe.run.workers or default_workers()
        if path.exists():
            with Store(path, create=False) as db:
                text, _ = plan_report(grid, db, workers, probe=not no_probe, stack=not no_stack)
                text += _advice(grid, db)
        else:
            text, _ = plan_report(grid, None, workers, probe=not no_probe, stack=not no_stack)
            text += _advice(grid, None)
        if lr_probe:
            text += _lr_probes(grid, path)
    except UserError as err:
        fail(err)
    click.echo(f"{recipe_path}: valid.")
    for line in networks:
        click.echo(line)
    click.echo(text, nl=False)


def _probe_grid(grid) -> dict:
    """Optimizer -> (the probe's identity in the store, its range test): one per optimizer
    of the grid, on its first configuration with it and first seed."""
    from runner.execution.executors import prepare_process
    from runner.training.lr_probe import probe, probed_jobs

    prepare_process(1, grid.datasets)
    return {
        optimizer: (ident, probe(job.spec(), grid.datasets[job.config.data_id]))
        for optimizer, (ident, job) in probed_jobs(grid).items()
    }


def _suggested_rates(grid) -> dict[str, list[float]]:
    """Per optimizer: the range test's steepest rate and the suggestion below it."""
    return {optimizer: found.levels[:2][::-1] for optimizer, (_, found) in _probe_grid(grid).items()}


def _lr_probes(grid, path) -> str:
    """A range test per optimizer of the grid, the levels it suggests, and a warning for the
    recipe's own levels outside them; kept in the store when there is one."""
    probes = _probe_grid(grid)
    if path.exists():
        from runner.store.database import Store

        with Store(path) as db:  # kept beside the results (a write: no read-only opening)
            for optimizer, (ident, found) in probes.items():
                db.record_lr_probe(ident, optimizer, found.to_json())
    lines = []
    for optimizer, (_, found) in probes.items():
        used = sorted({c.settings.train.lr for c in grid.configs if c.settings.train.optimizer == optimizer})
        lines.append(_probe_line(optimizer, found, used))
    return "".join(line + "\n" for line in lines)


def _probe_line(optimizer: str, found, used: list[float]) -> str:
    where = (f"falls fastest near {found.steepest:.2g}" if found.steepest is not None
             else "never falls clearly")  # fmt: skip
    blow = f", blows up near {found.blowup:.2g}" if found.blowup is not None else ", never blows up below 10"
    line = f"lr probe, {optimizer}: the training loss {where}{blow}"
    if found.levels:
        line += "; levels worth trying: " + ", ".join(f"{v:g}" for v in found.levels)
    high = [v for v in used if found.blowup is not None and v >= found.blowup / 3]
    low = [v for v in used if found.steepest is not None and v < found.steepest / 100]
    if high:
        line += f". Warning: the recipe's {', '.join(f'{v:g}' for v in high)} is near or past the blow-up"
    if low:
        line += f". Warning: the recipe's {', '.join(f'{v:g}' for v in low)} is far below where the loss falls fastest"
    return line + " (one seeded run; a rule of thumb, not a verdict)."


def _advice(grid, db) -> str:
    """Seeds advice from the stored results, or what a pilot of the recipe's seeds could tell."""
    from runner.evidence.advice import advice_lines, pilot_lines
    from runner.evidence.leaderboard import leaderboard, protocol_of

    alpha, margin = grid.recipe.verdicts.alpha, grid.recipe.verdicts.margin
    stored = db.jobs({j.key for j in grid}) if db is not None else []
    if stored:
        lines = advice_lines(leaderboard(grid, db).advice, alpha, margin) or [
            "Seeds advice: needs two configurations with at least 2 seeds finished in common."
        ]
    else:
        lines = pilot_lines(len(grid.recipe.seeds), alpha, protocol_of(grid, []))
    return "".join(line + "\n" for line in lines)


@click.command()
def schema():
    """Print the JSON Schema of the recipe format (for editors with TOML schema support)."""
    import json

    from runner.recipe.schema import recipe_schema

    click.echo(json.dumps(recipe_schema(), indent=2))


@click.command()
@click.argument("source")
@click.option(
    "--out",
    type=click.Path(),
    default=None,
    help="Recipe file to write (default: <data name>.toml here).",
)
@click.option("--target", default=None, help="The target column (default: guessed from the data).")
@click.option("--force", is_flag=True, help="Overwrite an existing file.")
@click.option("--lr-probe", is_flag=True, help="Choose each optimizer's learning rates by a range test on the data.")
def new(source, out, target, force, lr_probe):
    """Write a commented starter recipe for SOURCE: a CSV or NPZ file, or a bundled data set."""
    from runner.recipe.grid import expand
    from runner.recipe.loader import parse_recipe
    from runner.recipe.starter import starter_recipe, with_rates

    target_path = Path(out) if out else Path(f"{Path(source).stem}.toml")
    try:
        if target_path.exists() and not force:
            raise UserError("file exists", where=str(target_path), hint="Choose another --out or pass --force")
        text = starter_recipe(source, target_path, target)
        grid = expand(parse_recipe(text, target_path.resolve()))  # never write a starter that does not validate
        if lr_probe:
            text = with_rates(text, _suggested_rates(grid))
            expand(parse_recipe(text, target_path.resolve()))
        write_output(target_path, text)
    except UserError as err:
        fail(err)
    click.echo(f"wrote {target_path}; next: recipe check {target_path}")
