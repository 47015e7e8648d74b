"""Render a leaderboard as a text table, markdown, CSV or JSON; the number and table
formatting the diff and the HTML report share."""

from __future__ import annotations

import csv
import io
import json
import re

from runner.components.metrics import Goal
from runner.evidence.document import Ablation, Leaderboard, Row
from runner.evidence.flags import legend

__all__ = ["FORMATS", "grid_lines", "interval", "number", "p_text", "render", "render_ablation", "versus"]

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


def _columns(doc: Leaderboard) -> tuple[list[str], list[list[str]]]:
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
                ", ".join(f.text for f in row.flags),
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
    header, body = _columns(doc)
    widths = [max(len(r[i]) for r in [header, *body]) for i in range(len(header))]
    fmt = lambda cells: "  ".join(
        c.rjust(w) if i == 0 else c.ljust(w) for i, (c, w) in enumerate(zip(cells, widths))
    ).rstrip()
    lines = _head(doc) + ["", fmt(header), fmt(["-" * w for w in widths])]
    lines += [fmt(r) for r in body]
    lines += [""] + [f"* {c}" for c in doc.cautions]
    lines += _legend_lines(doc, markdown=False)
    return "\n".join(lines) + "\n"


def _legend_lines(doc: Leaderboard, markdown: bool) -> list[str]:
    """One line per flag on the board: what it means and what to try."""
    entries = legend(doc.rows)
    if not entries:
        return []
    # the flag as the board prints it, without its "k/n" count and what follows
    names = {f.code: re.sub(r" \d+/\d+.*$", "", f.text) for r in doc.rows for f in r.flags}
    if markdown:
        return ["", "**Flags**", ""] + [
            f"- **{names[code]}** (`{code}`): {meaning}. Try: {what}." for code, (meaning, what) in entries.items()
        ]
    return ["", "Flags:"] + [f"  {names[code]}: {meaning}. Try: {what}." for code, (meaning, what) in entries.items()]


def _markdown(doc: Leaderboard) -> str:
    header, body = _columns(doc)
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
    lines += _legend_lines(doc, markdown=True)
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
                ";".join(f.code for f in row.flags),
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


def _main_effects_lines(ab: Ablation, title, markdown: bool) -> list[str]:
    body = []
    for eff in ab.main_effects:
        for lvl in eff.levels:
            d = lvl.diff_vs_baseline
            label = lvl.label + (" (baseline)" if lvl.label == eff.baseline else "")
            cells = ["-"] * 4 if d is None else [f"{d.diff_mean:+.4f}", interval(d.ci95), p_text(d.p_value),
                                                  f"{d.n_pairs}/{d.n_seeds}"]  # fmt: skip
            body.append([eff.factor, label, number(lvl.mean), interval(lvl.ci95), *cells])
    if not body:
        return []
    head = (f"Main effects on {ab.metric}: each level averaged over the other factors; "
            "difference to the baseline paired over matched configurations and seeds")  # fmt: skip
    header = ["factor", "level", "mean", "95% CI", "vs baseline", "95% CI", "p", "pairs/seeds"]
    return ["", title(head), "", *grid_lines(header, body, markdown)]


def _one_at_a_time_lines(ab: Ablation, title, markdown: bool) -> list[str]:
    ofat = ab.one_at_a_time
    if not ofat or not ofat.rows:
        return []
    base = ", ".join(f"{k} = {v}" for k, v in ofat.baseline.items())
    body = [[r.factor, r.label, number(r.mean), "-" if r.diff_mean is None else f"{r.diff_mean:+.4f}",
             interval(r.ci95), p_text(r.p_value), str(r.n_pairs)] for r in ofat.rows]  # fmt: skip
    header = ["factor", "changed to", "mean", "vs baseline", "95% CI", "p", "seeds"]
    head = f"One factor at a time from the baseline ({base}; mean {number(ofat.baseline_mean)})"
    return ["", title(head), "", *grid_lines(header, body, markdown)]


def _interaction_lines(ab: Ablation, title, markdown: bool) -> list[str]:
    out: list[str] = []
    for inter in ab.interactions:
        a_levels = list(next(iter(inter.means.values())).keys()) if inter.means else []
        rows = [[bl, *[number(row[a]) for a in a_levels], inter.best_a_by_b[bl] or "-"]
                for bl, row in inter.means.items()]  # fmt: skip
        verdict = "depends on" if inter.depends else "does not depend on"
        out += ["", title(f"Interaction: the best {inter.a} {verdict} {inter.b} (means)"), ""]
        out += grid_lines([f"{inter.b} \\ {inter.a}", *a_levels, "best"], rows, markdown)
    return out


def _views_lines(ab: Ablation, title, markdown: bool) -> list[str]:
    out: list[str] = []
    if ab.regularization:
        out += ["", title("Regularization: val metric, train-val gap and weight sparsity"), ""]
        out += grid_lines(["factor", "level", "n", "mean", "gap", "zero w", "near-zero w"],
                          [[r.factor, r.label, str(r.n), number(r.mean), number(r.gap),
                            number(r.zero_fraction, 3), number(r.near_zero_fraction, 3)]
                           for r in ab.regularization], markdown)  # fmt: skip
    if ab.optimization:
        out += ["", title("Optimization: epochs to reach 95% of each job's best val metric, final train loss, "
                          "divergences"), ""]  # fmt: skip
        out += grid_lines(["factor", "level", "n", "mean", "epochs to 95%", "final loss", "diverged"],
                          [[r.factor, r.label, str(r.n), number(r.mean), number(r.epochs_to_95pct, 1),
                            number(r.final_train_loss), str(r.diverged)] for r in ab.optimization],
                          markdown)  # fmt: skip
    return out


def render_ablation(ab: Ablation, markdown: bool = False) -> str:
    """The ablation tables of a leaderboard, as text or markdown."""
    title = (lambda t: f"#### {t}") if markdown else (lambda t: t)
    out = [*_main_effects_lines(ab, title, markdown), *_one_at_a_time_lines(ab, title, markdown),
           *_interaction_lines(ab, title, markdown), *_views_lines(ab, title, markdown)]  # fmt: skip
    return "\n".join(out) + ("\n" if out else "")
