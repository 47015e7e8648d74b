"""What the commands share: turning a user error into one line and exit 2, where a
recipe's store lives, loading and expanding a recipe, and the common options."""

from __future__ import annotations

import sys
from pathlib import Path

import click

from runner.errors import UserError

__all__ = ["checked_on", "fail", "format_option", "load_grid", "own_networks", "store_option", "store_path"]


def fail(err: UserError) -> None:
    click.echo(f"error: {err.message()}", err=True)
    sys.exit(2)


def store_path(recipe, store: str | None) -> Path:
    return Path(store) if store else recipe.base_dir / "runs" / f"{recipe.name}.sqlite"


def checked_on(on: str | None) -> str | None:
    """``--on`` checked by the same rule as the recipe's ``[run] on``."""
    if on is None:
        return None
    from runner.recipe.constraints import Invalid
    from runner.recipe.loader import RUN

    try:
        return RUN["on"].constraint.check(on)
    except Invalid as bad:
        raise UserError(bad.problem, key="--on", value=on, allowed=bad.allowed, hint=bad.hint) from None


def load_grid(recipe_path: str):
    """The validated recipe and its grid. Validation imports nothing heavy, so a recipe's
    error is reported at once; commands import their own heavy modules after this."""
    from runner.recipe.loader import load_recipe

    recipe = load_recipe(recipe_path)
    from runner.recipe.grid import expand

    return recipe, expand(recipe)


def own_networks(grid) -> list[str]:
    """Validate the recipe's own networks (model.kind = "python") by running their code;
    lines saying so for the user. Torch is imported only when the recipe has one."""
    if all(c.module is None for c in grid.configs):
        return []
    from runner.training.user_module import check_user_modules

    return check_user_modules(grid)


store_option = click.option(
    "--store",
    "store",
    type=click.Path(),
    help="Results database (default: runs/<name>.sqlite beside the recipe).",
)
format_option = click.option(
    "--format",
    "fmt",
    type=click.Choice(["table", "markdown", "csv", "json"]),
    default=None,
    help="Leaderboard format (default: table).",
)
