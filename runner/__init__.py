"""recipe: a TOML recipe becomes a seeded, resumable, multi-seed training study on the CPU.

Pipeline: recipe (load + validate) -> grid (expand) -> jobs (run into the store) ->
store (SQLite) -> summary (leaderboard) -> render.
"""
from .errors import DataError, RecipeError, StoreError, UserError
from .grid import Grid, expand
from .recipe import Recipe, load_recipe
from .store import Store
from .summary import leaderboard

__all__ = ["DataError", "RecipeError", "StoreError", "UserError", "Grid", "expand", "Recipe",
           "load_recipe", "Store", "leaderboard"]
__version__ = "0.1.0"
