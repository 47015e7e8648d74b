"""Time the MLflow export of a 45-job grid to a fresh sqlite-backed MLflow store, and again
with nothing left to send, in one process (imports paid before the clock starts).

    python bench/mlflow_export.py [--old PATH] [--rounds N]

With ``--old`` (a copy of an earlier runner/outputs/mlflow_export.py, e.g. from
``git show REV:runner/outputs/mlflow_export.py > /tmp/old.py``) the two are timed in turn,
each into its own fresh tracking store, for N rounds: paired figures from one run. Prints
the seconds of each and the runs read back with their statuses. Record results in bench/RESULTS.md with
the date and CPU (lscpu); the machines are shared, so compare figures from one run only.
"""

from __future__ import annotations

import argparse
import importlib.util
import sys
import tempfile
import textwrap
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

RECIPE = """
    name = "bench-mlflow"
    seeds = [1, 2, 3, 4, 5]
    [data]
    source = "iris"
    [model]
    hidden = [16]
    [train]
    epochs = 20
    [factors]
    "train.optimizer" = ["sgd", "momentum", "adam"]
    "train.lr" = [0.003, 0.01, 0.03]
"""


def _module(path: str):
    spec = importlib.util.spec_from_file_location("old_mlflow_export", path)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def _once(name: str, export_all, grid, store: Path, uri: str) -> tuple[float, float, str]:
    from mlflow.tracking import MlflowClient

    from runner.store.database import Store

    MlflowClient(tracking_uri=uri).search_experiments(max_results=1)  # create the tracking schema untimed
    with Store(store) as db:
        t0 = time.perf_counter()
        sent, _, errors = export_all(uri, grid, db)
        t1 = time.perf_counter()
        again, there, errors2 = export_all(uri, grid, db)
        t2 = time.perf_counter()
    client = MlflowClient(tracking_uri=uri)
    exp = client.get_experiment_by_name("recipe/bench-mlflow")
    runs = client.search_runs([exp.experiment_id], max_results=1000)
    statuses = ", ".join(f"{s} {sum(r.info.status == s for r in runs)}" for s in sorted({r.info.status for r in runs}))
    assert sent == there == 45 and again == 0 and not errors and not errors2, (sent, there, again, errors, errors2)
    print(
        f"{name}: first export of {sent} jobs {t1 - t0:.2f} s; nothing to send {t2 - t1:.2f} s; "
        f"runs read back: {statuses}"
    )
    return t1 - t0, t2 - t1, statuses


def main() -> None:
    import logging

    from runner.cli.app import cli
    from runner.outputs import mlflow_export
    from runner.recipe.grid import expand
    from runner.recipe.loader import load_recipe

    parser = argparse.ArgumentParser()
    parser.add_argument("--old", default=None)
    parser.add_argument("--rounds", type=int, default=2)
    args = parser.parse_args()
    logging.getLogger("mlflow").setLevel(logging.ERROR)
    kinds = [("new", mlflow_export.export_all)]
    if args.old:
        kinds.insert(0, ("old", _module(args.old).export_all))
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        path = tmp / "r.toml"
        path.write_text(textwrap.dedent(RECIPE))
        base = tmp / "s.sqlite"
        try:
            cli(["run", str(path), "--store", str(base), "--workers", "1", "-q"], standalone_mode=False)
        except SystemExit:
            pass
        grid = expand(load_recipe(path))
        times: dict[str, list] = {name: [] for name, _ in kinds}
        for r in range(args.rounds):
            for name, export_all in kinds:
                store = tmp / f"{name}{r}.sqlite"
                store.write_bytes(base.read_bytes())  # the same results, no export recorded yet
                times[name].append(_once(name, export_all, grid, store, f"sqlite:///{tmp / f'{name}{r}.db'}"))
        for name, rows in times.items():
            firsts = ", ".join(f"{a:.1f}" for a, _, _ in rows)
            seconds = ", ".join(f"{b:.2f}" for _, b, _ in rows)
            print(f"{name}: first export {firsts} s; nothing to send {seconds} s")


if __name__ == "__main__":
    main()
