"""The bundle's card: a short markdown page saying what the network is, where it came from,
what the study's evidence says about its configuration, and what could mislead."""

from __future__ import annotations

import dataclasses
from typing import Any

from runner.evidence.document import Leaderboard, Row
from runner.outputs.bundle import Bundle
from runner.outputs.text import interval, number, standing

__all__ = ["export_cautions", "model_card"]

# Row fields the card shows in its own words; any other field of a row (verdicts the board
# gains later) is listed under the evidence as it is.
_SHOWN = {"config_id", "levels", "labels", "n", "mean", "std", "ci95", "per_seed", "test_mean", "test_per_seed"}
_SHOWN |= {"counts", "diagnostics", "flags", "rank", "vs_best", "verdict"}


def _value(v: Any) -> str:
    if isinstance(v, float):
        return number(v)
    if isinstance(v, (list, tuple)) and len(v) == 2 and all(isinstance(x, float) for x in v):
        return interval(v)
    if dataclasses.is_dataclass(v):
        return ", ".join(f"{f.name} {_value(getattr(v, f.name))}" for f in dataclasses.fields(v))
    return "-" if v is None else str(v)


def export_cautions(bundle: Bundle, row: Row, doc: Leaderboard) -> list[str]:
    """What a user of this network could be misled by, beyond the board's own cautions."""
    src = bundle.source
    out = []
    if src["weights"] == "refit":
        out.append(
            f"Refit on train+val for {src['epochs']} epochs: no held-out validation rows remain, so its val "
            "metrics are not reported; its test rows are seed "
            f"{src['seed']}'s, and the board's numbers are of the seeds' networks, not of this one."
        )
    else:
        out.append(
            f"One seed's network (seed {src['seed']}); the configuration's seeds spread by sd "
            f"{number(row.std)} on {doc.metric}: another seed's network would score differently."
        )
    if src.get("reproduced") is False:
        out.append(
            "The weights were retrained (they were not kept) and did NOT reproduce the stored metrics "
            "exactly: this machine, its libraries or thread count differ from the run's. The metrics below "
            "are the stored ones."
        )
    if row.rank != 1:
        out.append(f"Not the board's best configuration: rank {row.rank or '-'} on {doc.metric}.")
    out.append(
        "Predictions on rows this network trained on (the train rows"
        + (" and val rows" if src["weights"] == "refit" else "")
        + ") are optimistic; `recipe predict` marks them when given the training data."
    )
    return out


def model_card(bundle: Bundle, row: Row, doc: Leaderboard, rows: dict[str, int]) -> str:
    src, inputs, m = bundle.source, bundle.inputs, bundle.model
    how = {
        "kept": "the weights kept in the store when the job finished",
        "retrained": "retrained from the stored settings and seed"
        + (" in its stacked group" if src.get("stacked_group") else " on its own")
        + (", reproducing every stored metric exactly" if src.get("reproduced") else ""),
        "refit": f"trained once more on train+val for {src.get('epochs')} epochs (median of the seeds' chosen epochs)",
    }[src["weights"]]
    net = f"{m.kind}, hidden {list(m.hidden)}, {m.activation}" + (", batch norm" if m.batch_norm else "")
    if m.kind == "cnn":
        net += f", channels {list(m.channels)}, kernel {m.kernel_size}, pool {m.pool}"
    if m.dropout or m.input_dropout:
        net += f", dropout {m.dropout:g} (inputs {m.input_dropout:g})"
    labels = ", ".join(f"{k} = {v}" for k, v in src["labels"].items()) or "no factors"
    lines = [
        f"# {src['recipe']}: {row.label}",
        "",
        f"- Configuration: {labels} (id {src['config_id']}); seed {src['seed']}; job {src['job_key']}.",
        f"- Network: {net}; input {list(inputs.input_shape)}, {bundle.n_out} outputs ({inputs.task}).",
        f"- Weights: {how}.",
        f"- Data: {src['data_label']}, sha256 {src['data_fingerprint']}; rows "
        + ", ".join(f"{k} {v}" for k, v in rows.items())
        + f"; scaling {inputs.scale}, fitted on the {' + '.join(src['trained_on'])} rows.",
        f"- Recipe: {src['recipe_file']}, sha256 {src['recipe_hash']}.",
        "- Environment: " + ", ".join(f"{k} {v}" for k, v in sorted(src["environment"].items())) + ".",
    ]
    if inputs.classes:
        lines.append("- Classes: " + ", ".join(inputs.classes) + ".")
    lines += ["", "## Evidence from the leaderboard", ""]
    lines += [
        f"- Rank {row.rank or '-'} of {len(doc.rows)} on {doc.metric} ({doc.goal.words}), over {row.n} seeds: "
        f"mean {number(row.mean)}, sd {number(row.std)}, 95% CI {interval(row.ci95)}; test mean "
        f"{number(row.test_mean)} (shown, never ranked on).",
        f"- Verdict: {standing(row, doc.evidence.get('margin'))} (gap to the best of the others, "
        f"simultaneous {1 - doc.evidence.get('alpha', 0.05):.0%}).",
        f"- Flags: {', '.join(f.text for f in row.flags) or 'none'}.",
    ]
    for f in dataclasses.fields(row):
        if f.name not in _SHOWN:
            lines.append(f"- {f.name.replace('_', ' ')}: {_value(getattr(row, f.name))}.")
    lines += ["", "## This network's metrics", ""]
    for split, values in bundle.metrics.items():
        lines.append(f"- {split}: " + ", ".join(f"{k} {number(v)}" for k, v in sorted(values.items())))
    lines += ["", "## Cautions", ""]
    lines += [f"- {c}" for c in export_cautions(bundle, row, doc) + list(doc.cautions)]
    lines += [
        "",
        "## Files",
        "",
        "- `weights.safetensors`: the weights (safetensors; loading runs no code).",
        "- `model.json`: the network and preprocessing, read by `recipe predict` and "
        "`runner.outputs.predict.load_bundle`.",
    ]
    return "\n".join(lines) + "\n"
