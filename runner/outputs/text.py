"""Render a leaderboard as a text table, markdown, CSV or JSON; the number and table
formatting the diff and the HTML report share."""

from __future__ import annotations

import csv
import io
import json

from runner.components.metrics import Goal
from runner.evidence.document import Ablation, Leaderboard, Row

__all__ = [
    "FORMATS",
    "ablation_tables",
    "columns",
    "grid_lines",
    "interval",
    "number",
    "p_text",
    "render",
    "render_ablation",
    "versus",
]

FORMATS = ("csv", "json", "markdown", "table")


def number(value, digits: int = 4) -> str:
    if value is None:
        return "-"
    if abs(value) >= 1000:
        return f"{value:.1f}"
    return f"{value:.{digits}f}"


def interval(ci) -> str:
    return "-" if not ci else f"[{number(ci[0])}, {number(ci[1])}]"


def versus(row: Row) -> str:
    """The row's standing against the best, in words."""
    if row.rank == 1:
        return "best"
    vs = row.vs_best
    if vs is None:
        return "-"
    mark = "~best" if row.top_group else "worse"
    return f"{vs.diff_mean:+.4f} p={vs.p_holm:.2g} {mark}"


def columns(doc: Leaderboard) -> tuple[list[str], list[list[str]]]:
    factor_names = doc.factor_names
    header = ["rank", *factor_names, "n", "mean", "sd", "95% CI", "test", "vs best (Holm)", "flags"]
    body = []
    for row in doc.rows:
        n = f"{row.n}/{row.counts.total}"
        body.append(
            [
                str(row.rank or "-"),
                *[row.labels[f] for f in factor_names],
                n,
                number(row.mean),
                number(row.std),
                interval(row.ci95),
                number(row.test_mean),
                versus(row),
                ", ".join(row.flags) or "",
            ]
        )
    return header, body


def _head(doc: Leaderboard) -> list[str]:
    j = doc.jobs
    higher = "higher" if doc.goal is Goal.MAX else "lower"
    lines = [
        f"{doc.recipe}: ranked by {doc.metric} ({higher} is better); {len(doc.rows)} configurations, "
        f"{j.total} jobs: {j.done} done, {j.diverged} diverged, {j.failed} failed, {j.timeout} timed out, "
        f"{j.pending} pending"
    ]
    env = doc.environment
    if env.distinct > 1:
        lines.append("Note: stored jobs ran in differing environments (" + ", ".join(env.differs_in) + ").")
    if env.recipe_versions > 1:
        lines.append(
            f"Note: results come from {env.recipe_versions} versions of the recipe file; "
            "each job's own settings are the ones shown."
        )
    return lines


def _table(doc: Leaderboard) -> str:
    header, body = columns(doc)
    widths = [max(len(r[i]) for r in [header, *body]) for i in range(len(header))]
    fmt = lambda cells: "  ".join(
        c.rjust(w) if i == 0 else c.ljust(w) for i, (c, w) in enumerate(zip(cells, widths))
    ).rstrip()
    lines = _head(doc) + ["", fmt(header), fmt(["-" * w for w in widths])]
    lines += [fmt(r) for r in body]
    lines += [""] + [f"* {c}" for c in doc.cautions]
    return "\n".join(lines) + "\n"


def _markdown(doc: Leaderboard) -> str:
    header, body = columns(doc)
    esc = lambda s: s.replace("|", "\\|")
    lines = [
        f"### {doc.recipe}",
        "",
        *_head(doc),
        "",
        "| " + " | ".join(header) + " |",
        "|" + "|".join("---" for _ in header) + "|",
    ]
    lines += ["| " + " | ".join(esc(c) for c in r) + " |" for r in body]
    lines += [""] + [f"- {c}" for c in doc.cautions]
    return "\n".join(lines) + "\n"


def _csv(doc: Leaderboard) -> str:
    factor_names = doc.factor_names
    seeds = [str(s) for s in doc.seeds]
    out = io.StringIO()
    w = csv.writer(out, lineterminator="\n")
    w.writerow(
        [
            "rank",
            "config_id",
            *factor_names,
            "n",
            "mean",
            "std",
            "ci95_low",
            "ci95_high",
            "test_mean",
            "diff_vs_best",
            "p_holm",
            "top_group",
            "diverged",
            "failed",
            "flags",
            *[f"seed_{s}" for s in seeds],
        ]
    )
    for row in doc.rows:
        vs = row.vs_best
        ci = row.ci95 or [None, None]
        w.writerow(
            [
                row.rank,
                row.config_id,
                *[row.labels[f] for f in factor_names],
                row.n,
                row.mean,
                row.std,
                ci[0],
                ci[1],
                row.test_mean,
                vs.diff_mean if vs else None,
                vs.p_holm if vs else None,
                row.top_group,
                row.counts.diverged,
                row.counts.failed,
                ";".join(row.flags),
                *[row.per_seed.get(s) for s in seeds],
            ]
        )
    return out.getvalue()


def render(doc: Leaderboard, fmt: str) -> str:
    if fmt == "json":
        return json.dumps(doc.to_json(), indent=2, sort_keys=False) + "\n"
    return {"table": _table, "markdown": _markdown, "csv": _csv}[fmt](doc)


def grid_lines(header: list[str], body: list[list[str]], markdown: bool) -> list[str]:
    if markdown:
        esc = lambda s: s.replace("|", "\\|")
        return ["| " + " | ".join(header) + " |", "|" + "|".join("---" for _ in header) + "|"] + [
            "| " + " | ".join(esc(c) for c in r) + " |" for r in body
        ]
    widths = [max(len(r[i]) for r in [header, *body]) for i in range(len(header))]
    fmt = lambda cells: "  ".join(c.ljust(w) for c, w in zip(cells, widths)).rstrip()
    return [fmt(header), fmt(["-" * w for w in widths])] + [fmt(r) for r in body]


def p_text(value) -> str:
    return "-" if value is None else f"{value:.2g}"


Table = tuple[str, list[str], list[list[str]]]  # title, header, rows of text cells


def _main_effects(ab: Ablation) -> list[Table]:
    body = []
    for eff in ab.main_effects:
        for lvl in eff.levels:
            d = lvl.diff_vs_baseline
            body.append(
                [
                    eff.factor,
                    lvl.label + (" (baseline)" if lvl.label == eff.baseline else ""),
                    number(lvl.mean),
                    interval(lvl.ci95),
                    "-" if d is None else f"{d.diff_mean:+.4f}",
                    "-" if d is None else interval(d.ci95),
                    "-" if d is None else p_text(d.p_value),
                    "-" if d is None else f"{d.n_pairs}/{d.n_seeds}",
                ]
            )
    if not body:
        return []
    title = (
        f"Main effects on {ab.metric}: each level averaged over the other factors; "
        "difference to the baseline paired over matched configurations and seeds"
    )
    return [(title, ["factor", "level", "mean", "95% CI", "vs baseline", "95% CI", "p", "pairs/seeds"], body)]


def _one_at_a_time(ab: Ablation) -> list[Table]:
    ofat = ab.one_at_a_time
    if not (ofat and ofat.rows):
        return []
    base = ", ".join(f"{k} = {v}" for k, v in ofat.baseline.items())
    rows = [
        [
            r.factor,
            r.label,
            number(r.mean),
            "-" if r.diff_mean is None else f"{r.diff_mean:+.4f}",
            interval(r.ci95),
            p_text(r.p_value),
            str(r.n_pairs),
        ]
        for r in ofat.rows
    ]
    title = f"One factor at a time from the baseline ({base}; mean {number(ofat.baseline_mean)})"
    return [(title, ["factor", "changed to", "mean", "vs baseline", "95% CI", "p", "seeds"], rows)]


def _interactions(ab: Ablation) -> list[Table]:
    out = []
    for inter in ab.interactions:
        a_levels = list(next(iter(inter.means.values())).keys()) if inter.means else []
        rows = [
            [bl, *[number(row[a]) for a in a_levels], inter.best_a_by_b[bl] or "-"] for bl, row in inter.means.items()
        ]
        verdict = "depends on" if inter.depends else "does not depend on"
        title = f"Interaction: the best {inter.a} {verdict} {inter.b} (means)"
        out.append((title, [f"{inter.b} \\ {inter.a}", *a_levels, "best"], rows))
    return out


def _views(ab: Ablation) -> list[Table]:
    out = []
    if ab.regularization:
        rows = [
            [
                r.factor,
                r.label,
                str(r.n),
                number(r.mean),
                number(r.gap),
                number(r.zero_fraction, 3),
                number(r.near_zero_fraction, 3),
            ]
            for r in ab.regularization
        ]
        header = ["factor", "level", "n", "mean", "gap", "zero w", "near-zero w"]
        out.append(("Regularization: val metric, train-val gap and weight sparsity", header, rows))
    if ab.optimization:
        rows = [
            [
                r.factor,
                r.label,
                str(r.n),
                number(r.mean),
                number(r.epochs_to_95pct, 1),
                number(r.final_train_loss),
                str(r.diverged),
            ]
            for r in ab.optimization
        ]
        header = ["factor", "level", "n", "mean", "epochs to 95%", "final loss", "diverged"]
        title = "Optimization: epochs to reach 95% of each job's best val metric, final train loss, divergences"
        out.append((title, header, rows))
    return out


def ablation_tables(ab: Ablation) -> list[Table]:
    """The ablation tables as (title, header, rows of text cells), for every renderer."""
    return _main_effects(ab) + _one_at_a_time(ab) + _interactions(ab) + _views(ab)


def render_ablation(ab: Ablation, markdown: bool = False) -> str:
    """The ablation tables of a leaderboard, as text or markdown."""
    out: list[str] = []
    for title, header, body in ablation_tables(ab):
        out += ["", f"#### {title}" if markdown else title, ""]
        out += grid_lines(header, body, markdown)
    return "\n".join(out) + ("\n" if out else "")
