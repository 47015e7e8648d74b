"""Commands that put a study's network to work: export, predict."""

from __future__ import annotations

from pathlib import Path

import click

from runner.cli.common import fail, load_grid, store_option, store_path
from runner.errors import UserError


@click.command("export")
@click.argument("recipe_path", metavar="RECIPE", type=click.Path())
@store_option
@click.option(
    "--config",
    "config",
    default=None,
    metavar="LABELS",
    help='The configuration: its labels as the board shows them (e.g. "adam, 0.001"), or its id. Default: the best.',
)
@click.option("--rank", type=click.IntRange(1), default=None, help="The configuration at this rank instead.")
@click.option(
    "--seed", type=int, default=None, help="The seed's network (default: the seed with the median val score)."
)
@click.option("--refit", is_flag=True, help="Train once more on train+val for the median of the seeds' chosen epochs.")
@click.option("--onnx", is_flag=True, help="Also write model.onnx (needs the onnx extra).")
@click.option("--out", required=True, type=click.Path(file_okay=False), help="Bundle directory to write.")
def export(recipe_path, store, config, rank, seed, refit, onnx, out):
    """Write a model bundle of one of RECIPE's configurations: weights, description, card."""
    try:
        if config is not None and rank is not None:
            raise UserError("give --config or --rank, not both", key="--rank", value=rank)
        if seed is not None and refit:
            raise UserError(
                "give --seed or --refit, not both", key="--refit", hint="A refit uses the median-val seed's split"
            )
        recipe, grid = load_grid(recipe_path)
        from runner.evidence.leaderboard import leaderboard
        from runner.outputs.winner import export_bundle
        from runner.store.database import Store

        with Store(store_path(recipe, store), create=False) as db:
            doc = leaderboard(grid, db)
            done = export_bundle(grid, db, doc, Path(out), config, rank, seed, refit, onnx)
    except UserError as err:
        fail(err)
    how = {
        "kept": "kept weights",
        "retrained": "retrained"
        + (f" (its stacked group of {len(done.group)})" if done.group else "")
        + (", every stored metric reproduced" if done.reproduced else ", stored metrics NOT reproduced: see the card"),
        "refit": f"refit on train+val for {done.epochs} epochs",
    }[done.how]
    click.echo(f"wrote {out}: {done.row.label} (rank {done.row.rank or '-'}), seed {done.job.seed}, {how}")
    if done.onnx:
        click.echo(f"wrote {done.onnx}")


@click.command()
@click.argument("bundle", type=click.Path(file_okay=False))
@click.argument("data")
@click.option("--out", required=True, type=click.Path(dir_okay=False), help="Predictions CSV to write.")
@click.option("--run-code", is_flag=True, help="Load a bundle whose network is Python code (its network.py runs).")
def predict(bundle, data, out, run_code):
    """Apply BUNDLE to DATA (a CSV or NPZ file, or a bundled data set): one row out per row in."""
    try:
        from runner.outputs.predict import load_bundle
        from runner.outputs.predictions import predict_file

        predictor = load_bundle(bundle, run_code=run_code)
        scored = predict_file(predictor, data, Path(out))
    except UserError as err:
        fail(err)
    click.echo(f"wrote {out}: {scored.rows} rows")
    src = predictor.bundle.source
    trained_on = set(src.get("trained_on", ["train"]))
    stored = predictor.bundle.metrics
    for split, values in scored.metrics.items():
        note = " (trained on: optimistic)" if split in trained_on else ""
        parts = []
        for name, value in sorted(values.items()):
            text = f"{name} {value:.6g}"
            if split in stored and stored[split].get(name) is not None:
                same = "the same" if stored[split][name] == value else f"{stored[split][name]:.6g}"
                text += f" (stored: {same})"
            parts.append(text)
        click.echo(f"{split}, {scored.counts[split]} rows{note}: " + ", ".join(parts))
    if scored.unknown_labels:
        click.echo(f"{scored.unknown_labels} rows have a target label the bundle does not know; not scored.", err=True)
