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
    "signed",
    "standing",
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


def signed(value: float | None) -> str:
    if value is None:
        return "-"
    return "0" if value == 0 else f"{value:+.4f}"


def standing(row: Row, margin: float | None = None) -> str:
    """The row's verdict and the simultaneous interval it rests on (the gap to the best of the
    other configurations; positive is better)."""
    v = row.verdict
    if v is None or v.kind == "no_verdict":
        return "no verdict"
    word = {"possibly_best": "possibly best", "behind": "behind",
            "within_margin": f"within +-{margin:g}" if margin else "within margin"}[v.kind]  # fmt: skip
    if v.low is None and v.high is None:
        return f"{word} (not bounded)"
    return f"{word} [{signed(v.low)}, {signed(v.high)}]"


# What the verdict column means, for headers and legends.
STANDING_HEADER = "verdict [gap to best, simultaneous]"


def columns(doc: Leaderboard) -> tuple[list[str], list[list[str]]]:
    factor_names = doc.factor_names
    early = any(r.best_epoch_median is not None for r in doc.rows)
    ci_head = f"{1 - doc.evidence['alpha']:.0%} CI" if doc.evidence.get("alpha") else "95% CI"
    raced = doc.race is not None
    header = ["rank", *factor_names, "n", "mean", "sd", ci_head, "test", *(["best ep."] if early else []),
              *(["race"] if raced else []), STANDING_HEADER, "flags"]  # fmt: skip
    body = []
    margin = doc.evidence.get("margin")
    for row in doc.rows:
        epoch = ["-" if row.best_epoch_median is None else f"{row.best_epoch_median:g}"] if early else []
        race = [row.race.text if row.race else "-"] if raced else []
        body.append([str(row.rank or "-"), *[row.labels[f] for f in factor_names], f"{row.n}/{row.counts.total}",
                     number(row.mean), number(row.std), interval(row.ci95), number(row.test_mean), *epoch, *race,
                     standing(row, margin), ", ".join(f.text for f in row.flags)])  # fmt: skip
    return header, body


def _head(doc: Leaderboard) -> list[str]:
    j = doc.jobs
    higher = "higher" if doc.goal is Goal.MAX else "lower"
    lines = [
        f"{doc.recipe}: ranked by {doc.metric} ({higher} is better); {len(doc.rows)} configurations, "
        f"{j.total} jobs: {j.done} done, {j.diverged} diverged, {j.failed} failed, {j.timeout} timed out, "
        f"{j.pending} pending" + (f", {j.skipped} not run (adaptive seeding)" if j.skipped else "")
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
    lines += [""] + [f"* {c}" for c in doc.cautions] + [f"* {a}" for a in _advice(doc)]
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


def _advice(doc: Leaderboard) -> list[str]:
    from runner.evidence.advice import advice_lines

    return advice_lines(doc.advice, doc.evidence.get("alpha") or 0.05, doc.evidence.get("margin") or 0.0)


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
    lines += [""] + [f"- {c}" for c in doc.cautions] + [f"- {a}" for a in _advice(doc)]
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
            "verdict",
            "gap_low",
            "gap_high",
            "diff_vs_top",
            "p_holm",
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
                row.verdict.kind if row.verdict else None,
                row.verdict.low if row.verdict else None,
                row.verdict.high if row.verdict else None,
                vs.diff_mean if vs else None,
                vs.p_holm if vs else None,
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


def _basis(ab: Ablation) -> str:
    """What the ablation's intervals and p-values are, for the tables' titles."""
    if ab.protocol == "fixed":
        return ("intervals: Student t; p: exact sign-flip test (never below 2/2^n with n seeds, so an interval "
                "may exclude 0 while p stays above 0.05 with few seeds)")  # fmt: skip
    return "intervals and p: Student t with the variance corrected for overlapping training sets"


Table = tuple[str, list[str], list[list[str]]]  # title, header, rows of text cells


def _main_effects(ab: Ablation) -> list[Table]:
    body, notes = [], []
    for eff in ab.main_effects:
        if eff.note:
            notes.append(f"{eff.factor}: {eff.note}")
        for lvl in eff.levels:
            d = lvl.diff_vs_baseline
            label = lvl.label + (" (baseline)" if lvl.label == eff.baseline else "")
            cells = ["-"] * 4 if d is None else [signed(d.diff_mean), interval(d.ci95), p_text(d.p_value),
                                                  f"{d.n_contexts}/{d.n_seeds}"]  # fmt: skip
            body.append([eff.factor, label, number(lvl.mean), interval(lvl.ci95), *cells])
    if not body:
        return []
    title = (f"Main effects on {ab.metric}: each level over the contexts (other factors' levels) in which "
             "every level finished, on matched seeds; difference to the baseline paired by seed; "
             f"{_basis(ab)}" + "".join(f". {n}" for n in notes))  # fmt: skip
    header = ["factor", "level", "mean", "95% CI", "vs baseline", "95% CI", "p", "contexts/seeds"]
    return [(title, header, body)]


def _one_at_a_time(ab: Ablation) -> list[Table]:
    ofat = ab.one_at_a_time
    if not ofat or not ofat.rows:
        return []
    base = ", ".join(f"{k} = {v}" for k, v in ofat.baseline.items())
    body = [[r.factor, r.label, number(r.mean), signed(r.diff_mean), interval(r.ci95), p_text(r.p_value),
             str(r.n_pairs)] for r in ofat.rows]  # fmt: skip
    header = ["factor", "changed to", "mean", "vs baseline", "95% CI", "p", "seeds"]
    title = f"One factor at a time from the baseline ({base}; mean {number(ofat.baseline_mean)}); {_basis(ab)}"
    return [(title, header, body)]


def _interactions(ab: Ablation) -> list[Table]:
    out: list[Table] = []
    for inter in ab.interactions:
        a_levels = list(next(iter(inter.means.values())).keys()) if inter.means else []
        rows = [[bl, *[number(row[a]) for a in a_levels], inter.best_a_by_b[bl] or "-"]
                for bl, row in inter.means.items()]  # fmt: skip
        if inter.largest is None:
            verdict = f"cannot be assessed ({inter.note})"
        else:
            c = inter.largest
            word = "depends on" if inter.depends else "is not shown to depend on"
            where = f"; {inter.note}" if inter.note else ""
            verdict = (f"the best {inter.a} {word} {inter.b} (largest contrast {signed(c['estimate'])}, "
                       f"simultaneous 95% {interval([c['low'], c['high']]) if c['low'] is not None else '-'}; "
                       f"F test p {p_text(inter.p_value)}{where})")  # fmt: skip
        out.append((f"Interaction of {inter.a} and {inter.b}: {verdict}",
                    [f"{inter.b} \\ {inter.a}", *a_levels, "best"], rows))  # fmt: skip
    return out


def _views(ab: Ablation) -> list[Table]:
    out: list[Table] = []
    if ab.regularization:
        rows = [[r.factor, r.label, str(r.n), number(r.mean), number(r.gap), number(r.zero_fraction, 3),
                 number(r.near_zero_fraction, 3)] for r in ab.regularization]  # fmt: skip
        header = ["factor", "level", "n", "mean", "gap", "zero w", "near-zero w"]
        out.append(("Regularization: val metric, train-val gap and weight sparsity", header, rows))
    if ab.optimization:
        rows = [[r.factor, r.label, str(r.n), number(r.mean), number(r.epochs_to_95pct, 1),
                 number(r.final_train_loss), str(r.diverged)] for r in ab.optimization]  # fmt: skip
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
