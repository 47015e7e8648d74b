"""``recipe export``: a configuration chosen on the leaderboard, written as a model bundle.

The configuration is the board's best unless ``--config`` (its labels as the board shows
them, or its id) or ``--rank`` names another. The network is one seed's: ``--seed``, or by
default the seed whose validation score is the configuration's median (the best seed's
score would be an optimistic pick). Its weights come from the store when they were kept,
else the job is retrained exactly as it trained (training/replay.py) and the retrained
metrics are checked against the stored ones. ``--refit`` instead trains the configuration
once more on that seed's train+val rows for the median of its seeds' chosen epochs.
"""

from __future__ import annotations

import statistics
from dataclasses import dataclass
from pathlib import Path

from runner.datasets.rows import split_rows
from runner.datasets.splits import Splits, split_and_scale
from runner.errors import UserError
from runner.evidence.document import Leaderboard, Row
from runner.outputs.bundle import Bundle, Inputs, write_bundle
from runner.outputs.card import model_card
from runner.recipe.grid import Grid, Job
from runner.store.database import Store
from runner.training.job import Status

__all__ = ["Exported", "choose_job", "choose_row", "export_bundle"]


def choose_row(doc: Leaderboard, config: str | None = None, rank: int | None = None) -> Row:
    """The leaderboard row named by ``config`` (labels as shown, or id) or ``rank``; the best by default."""
    if config is not None:
        for row in doc.rows:
            if config in (row.label, row.config_id):
                return row
        raise UserError(
            "no configuration with these labels",
            key="--config",
            value=config,
            allowed="; ".join(f'"{r.label}"' for r in doc.rows[:12]) + ("; ..." if len(doc.rows) > 12 else ""),
        )
    ranked = [r for r in doc.rows if r.rank is not None]
    want = rank or 1
    for row in ranked:
        if row.rank == want:
            return row
    raise UserError(
        "no ranked configuration at this rank" if ranked else "no configuration has a done job yet",
        key="--rank",
        value=want,
        allowed=f"1 to {len(ranked)}" if ranked else None,
        hint=None if ranked else "Run the recipe first: recipe run RECIPE",
    )


def choose_job(row: Row, grid: Grid, store: Store, seed: int | None = None) -> Job:
    """The configuration's done job for ``seed``; by default the seed whose val score is
    nearest the configuration's median (ties: the earlier seed in the recipe)."""
    jobs = [j for j in grid if j.config.id == row.config_id]
    done = {r.key for r in store.jobs([j.key for j in jobs]) if r.status is Status.DONE}
    if seed is not None:
        for j in jobs:
            if j.seed == seed and j.key in done:
                return j
        raise UserError(
            "this configuration has no done job with this seed",
            key="--seed",
            value=seed,
            allowed=", ".join(str(j.seed) for j in jobs if j.key in done) or "(no done seeds)",
        )
    scored = [(j, row.per_seed.get(str(j.seed))) for j in jobs if j.key in done]
    scored = [(j, v) for j, v in scored if v is not None]
    if not scored:
        raise UserError("this configuration has no done job to export", value=row.label, hint="Choose another one")
    middle = statistics.median(v for _, v in scored)
    return min(scored, key=lambda jv: abs(jv[1] - middle))[0]


@dataclass(frozen=True)
class Exported:
    out: Path
    row: Row
    job: Job
    how: str  # "kept", "retrained" or "refit"
    reproduced: bool | None  # retrained: every stored metric came out the same
    group: tuple[str, ...]  # the stacked group it trained (and was retrained) in
    epochs: int | None  # refit: epochs trained
    onnx: Path | None


def _inputs(job: Job, grid: Grid, sp: Splits) -> Inputs:
    """What the bundle needs to prepare raw rows as ``sp``'s training rows were prepared."""
    ds = grid.datasets[job.config.data_id]
    pre = sp.preprocessing
    assert pre is not None
    encoded = ds.layout is not None  # a table with text or empty cells: the bundle encodes raw cells
    return Inputs(
        task=str(ds.task),
        features=tuple(c.name for c in pre.columns) if encoded else tuple(ds.feature_names),
        input_shape=tuple(int(v) for v in ds.X.shape[1:]),
        scale=pre.scale,
        subtract=pre.offset,
        divide_by=pre.divisor,
        classes=tuple(ds.classes),
        target=job.config.settings.data.target,
        target_mean=sp.y_mean,
        target_std=sp.y_std,
        encodings=pre.to_json() if encoded else None,
    )


def _weights(job: Job, grid: Grid, store: Store):
    """(weights, how, reproduced, group): kept in the store, or retrained as it trained."""
    from runner.training.replay import retrain
    from runner.training.weights import decode

    blob = store.weights(job.key)
    group = store.trained_as(job.key) or ()
    if blob is not None:
        return decode(blob), "kept", None, group
    again = retrain(job, grid, store)
    if again.result.weights is None:
        raise UserError(f"retraining the job did not finish ({again.result.status}: {again.result.error})", key=job.key)
    return again.result.weights, "retrained", again.reproduced, again.group


def export_bundle(
    grid: Grid,
    store: Store,
    doc: Leaderboard,
    out: Path,
    config: str | None = None,
    rank: int | None = None,
    seed: int | None = None,
    refit: bool = False,
    onnx: bool = False,
) -> Exported:
    """Choose, obtain the weights, and write the bundle into ``out``."""
    from runner.training.replay import refit as refit_job
    from runner.training.replay import refit_epochs

    row = choose_row(doc, config, rank)
    job = choose_job(row, grid, store, seed)
    ds = grid.datasets[job.config.data_id]
    rows = split_rows(ds, job.config.settings.data, job.seed, job.fold)  # row numbers by split
    stored = store.jobs([job.key])[0]
    source = {
        "recipe": grid.recipe.name,
        "recipe_file": grid.recipe.path.name,
        "recipe_hash": grid.recipe.hash,
        "job_key": job.key,
        "config_id": job.config.id,
        "labels": grid.labels(job.config),
        "seed": job.seed,
        "data_fingerprint": ds.fingerprint,
        "data_label": ds.label,
        "rank_by": grid.rank_by,
        "settings": job.config.settings.to_dict(),
        "environment": {k: v for k, v in stored.env.items() if k != "pid"},
    }
    epochs = reproduced = None
    group: tuple[str, ...] = ()
    if refit:
        epochs = refit_epochs([j for j in grid if j.config.id == row.config_id], store)
        done = refit_job(job, grid, epochs, int(stored.env.get("threads", 1)))
        if done.result.weights is None:
            raise UserError(f"the refit did not finish ({done.result.status}: {done.result.error})", key="--refit")
        weights, how = done.result.weights, "refit"
        inputs = _inputs(job, grid, done.splits)
        # val rows were trained on; the training metric is over train+val rows
        metrics = {("train+val" if s == "train" else s): v for s, v in done.result.metrics.items() if s != "val"}
        source |= {"trained_on": ["train", "val"], "epochs": epochs, "environment": done.result.env}
    else:
        weights, how, reproduced, group = _weights(job, grid, store)
        inputs = _inputs(job, grid, split_and_scale(ds, job.config.settings.data, job.seed, job.fold))
        metrics = store.metrics().get(job.key, {})
        source |= {"trained_on": ["train"], "epochs": stored.best_epoch}
    source |= {"weights": how, "stacked_group": list(group), "reproduced": reproduced}
    source["environment"] = {k: v for k, v in source["environment"].items() if k != "pid"}
    module = job.config.module
    bundle = Bundle(job.config.settings.model, len(ds.classes) or 1, inputs, source, metrics,
                    code=module.source if module is not None else None)  # fmt: skip
    rows_count = {k: len(v) for k, v in rows.items()}
    write_bundle(out, bundle, weights, model_card(bundle, row, doc, rows_count))
    onnx_path = None
    if onnx:
        from runner.outputs.onnx_export import write_onnx

        onnx_path = write_onnx(out, bundle, weights)
    return Exported(out, row, job, how, reproduced, tuple(group), epochs, onnx_path)
