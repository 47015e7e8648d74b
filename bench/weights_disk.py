"""Disk cost of keeping trained weights ([run] keep_weights), on the example recipes.

    python bench/weights_disk.py [--run RECIPE ...]

For every recipe in recipes/: each job's weights blob exactly as the store keeps it (its
network built from the job's settings and encoded; a blob's size does not depend on the
trained values), summed over the grid ("all"). With --run, those recipes are also run into
a temporary store with keep_weights = "all", and the weights' bytes are read back from the
store before and after keeping only the possibly-best configurations (the default), with
the store file's size. Record results in bench/RESULTS.md with the date and CPU (lscpu).
"""

from __future__ import annotations

import argparse
import shutil
import sqlite3
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))


def grid_sizes(path: Path) -> tuple[int, int, int]:
    """(jobs, configurations, bytes of every job's weights blob)."""
    import torch

    from runner.recipe.grid import expand
    from runner.recipe.loader import load_recipe
    from runner.training.models import build_model
    from runner.training.weights import encode

    grid = expand(load_recipe(path))
    per_config = {}
    for config in grid.configs:
        ds = grid.datasets[config.data_id]
        g = torch.Generator()
        net = build_model(config.settings.model, tuple(ds.X.shape[1:]), len(ds.classes) or 1, g, g)
        state = {k: v.detach().numpy() for k, v in net.state_dict().items()}
        per_config[config.id] = len(encode(state))
    seeds = len(grid.recipe.seeds)
    return len(grid), len(grid.configs), seeds * sum(per_config.values())


def run_and_prune(path: Path) -> tuple[int, int, int, int]:
    """(bytes kept with "all", bytes after keeping the possibly-best, jobs kept, store file bytes)."""
    from runner.cli.app import cli
    from runner.evidence.leaderboard import leaderboard
    from runner.execution.retention import retain
    from runner.recipe.grid import expand
    from runner.recipe.loader import load_recipe
    from runner.store.database import Store

    with tempfile.TemporaryDirectory() as tmp:
        recipe = Path(tmp) / path.name
        text = path.read_text().replace('"../data/', f'"{ROOT}/data/')
        recipe.write_text(text + '\n[run]\nkeep_weights = "all"\n' if "[run]" not in text else text)
        store = Path(tmp) / "s.sqlite"
        try:
            cli(["run", str(recipe), "--store", str(store), "-q"], standalone_mode=False)
        except SystemExit:
            pass
        with sqlite3.connect(store) as c:
            before = c.execute("SELECT coalesce(sum(length(data)), 0) FROM weights").fetchone()[0]
        grid = expand(load_recipe(recipe))
        with Store(store) as db:
            kept = retain(grid, db, leaderboard(grid, db), "possibly_best")
        size = store.stat().st_size + sum(p.stat().st_size for p in store.parent.glob("s.sqlite-*"))
        shutil.rmtree(tmp, ignore_errors=True)
        return before, kept.size, kept.jobs, size


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--run", nargs="*", default=[], help="recipe file names in recipes/ to run as well")
    args = parser.parse_args()
    print("| recipe | jobs | configurations | weights, all jobs | per job |")
    print("| --- | --- | --- | --- | --- |")
    for path in sorted((ROOT / "recipes").glob("*.toml")):
        jobs, configs, size = grid_sizes(path)
        print(f"| {path.name} | {jobs} | {configs} | {size / 1024:.0f} KiB | {size / jobs / 1024:.1f} KiB |")
    for name in args.run:
        before, after, kept, store = run_and_prune(ROOT / "recipes" / name)
        print(
            f"{name}: run with keep_weights = all: {before / 1024:.0f} KiB of weights; keeping the possibly-best "
            f"configurations: {after / 1024:.0f} KiB ({kept} jobs); store file {store / 1024:.0f} KiB"
        )


if __name__ == "__main__":
    main()
