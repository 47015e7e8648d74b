"""recipe: a TOML recipe becomes a seeded, resumable, multi-seed training study on the CPU.

Pipeline: recipe (load + validate) -> grid (expand) -> jobs (run into the store) ->
store (SQLite) -> summary (leaderboard) -> render.

The names below are imported on first use (PEP 562), so importing one module of the
package (a worker's ``runner.execution.executors``, the CLI's ``runner.errors``) does not pay for
torch, scipy.stats and scikit-learn unless that module needs them: ``recipe --help`` and
a worker's start-up stay quick.
"""

from __future__ import annotations

import importlib

__all__ = [
    "DataError",
    "Grid",
    "Recipe",
    "RecipeError",
    "Store",
    "StoreError",
    "UserError",
    "expand",
    "leaderboard",
    "load_recipe",
]
__version__ = "0.1.0"

_HOME = {
    "DataError": "errors",
    "RecipeError": "errors",
    "StoreError": "errors",
    "UserError": "errors",
    "Grid": "recipe.grid",
    "expand": "recipe.grid",
    "Recipe": "recipe.loader",
    "load_recipe": "recipe.loader",
    "Store": "store.database",
    "leaderboard": "evidence.leaderboard",
}


def __getattr__(name: str):
    if name in _HOME:
        value = getattr(importlib.import_module(f".{_HOME[name]}", __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def __dir__():
    return sorted([*globals(), *__all__])
