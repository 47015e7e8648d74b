"""`recipe check`'s run-time estimate against the run it estimates, timed in one run.

Prints the estimate, the measured run (in this process, one thread, as `recipe run
--workers 1` trains) and their ratio, stacked and one job at a time. A planning estimate
within a factor of 3 either way is the goal (common practice for planning, not a published
bound). Run: python bench/estimate.py
"""

from __future__ import annotations

import sys
import tempfile
import textwrap
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from runner.execution.estimate import estimate_seconds
from runner.execution.planning import execute, make_executor
from runner.recipe.grid import expand
from runner.recipe.loader import parse_recipe
from runner.store.database import Store

RECIPE = textwrap.dedent("""
    name = "estimate"
    seeds = [1, 2, 3, 4]
    [data]
    source = "digits"
    split = { val = 0.2, test = 0.0 }
    [model]
    hidden = [64, 64]
    [train]
    optimizer = "adam"
    batch_size = 32
    epochs = 6
    [factors]
    "train.lr" = [1e-3, 3e-3]
""")


def main() -> None:
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "estimate.toml"
        path.write_text(RECIPE)
        print(f"{'path':<14} {'estimate s':>10} {'run s':>8} {'ratio':>6}  goal: ratio in [1/3, 3]")
        for stack in (True, False):
            grid = expand(parse_recipe(RECIPE, path))
            estimate = estimate_seconds(grid, list(grid), workers=1, stack=stack)
            with Store(Path(tmp) / f"s{stack}.sqlite") as db:
                start = time.perf_counter()
                execute(grid, db, list(grid), make_executor("local", 1), stack=stack)
                actual = time.perf_counter() - start
            ratio = estimate / actual
            verdict = "PASS" if 1 / 3 < ratio < 3 else "FAIL"
            name = "stacked" if stack else "one at a time"
            print(f"{name:<14} {estimate:>10.2f} {actual:>8.2f} {ratio:>6.2f}  {verdict}")


if __name__ == "__main__":
    main()
