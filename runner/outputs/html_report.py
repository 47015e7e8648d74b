"""A self-contained HTML report: everything the board knows, in one file.

Sections: the leaderboard (the board's own columns, whatever verdicts it carries) and its
cautions; each configuration's interval as a point with whiskers; learning curves of the
rank metric and the losses (top configurations and the baseline); main effects; the
ablation tables; per-layer gradient norms at initialization; sparsity and dead units where
recorded; the resolved settings (shared, and what the factors vary); the environments and
data fingerprints. Figures are embedded PNG (figures.py); nothing is fetched from the
network to view the file.
"""

from __future__ import annotations

import base64
import html
import io

import numpy as np

from runner.evidence.document import Leaderboard
from runner.evidence.leaderboard import leaderboard
from runner.outputs import figures
from runner.outputs.text import ablation_tables, columns
from runner.recipe.grid import Grid
from runner.store.database import Store

__all__ = ["build_report"]

TOP = 3
_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",sans-serif;margin:2rem auto;max-width:1100px;
color:#1d2a33;background:#fbfaf7;line-height:1.45;padding:0 1rem}
h1{font-size:1.6rem;margin-bottom:.2rem}h2{font-size:1.2rem;margin-top:2.2rem;border-bottom:2px solid #d8cfc0}
h3{font-size:1rem;margin:1.2rem 0 .3rem}
.sub{color:#5b6770}table{border-collapse:collapse;font-size:.85rem;margin:.6rem 0;width:100%}
th,td{padding:.28rem .5rem;border-bottom:1px solid #e4ddd1;text-align:left;white-space:nowrap}
td.wrap{white-space:normal;min-width:8rem}
th{background:#efe9df}tr.top td{background:#e8f1ee}td.num{text-align:right;font-variant-numeric:tabular-nums}
td.flag{color:#9a3412;font-weight:600;white-space:normal}
.caution{background:#fff4e0;border-left:4px solid #d1782c;padding:.5rem .8rem}
figure{margin:1rem 0}figure img{max-width:100%;border:1px solid #e4ddd1;background:#fff}
figcaption{color:#5b6770;font-size:.85rem}code{font-size:.85rem}
nav a{margin-right:.8rem;color:#23577a}
"""
_CHECK = """<script>
window.addEventListener('load', function () {
  var imgs = Array.prototype.slice.call(document.querySelectorAll('figure img'));
  document.body.setAttribute('data-figures', imgs.length);
  document.body.setAttribute('data-figures-drawn', imgs.filter(function (i) {
    return i.complete && i.naturalWidth > 0; }).length);
});
</script>"""
_NUMERIC = ("mean", "sd", "95% CI", "test", "n")


def _png(fig, plt) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100, bbox_inches="tight", facecolor="white")
    plt.close(fig)
    return base64.b64encode(buf.getvalue()).decode("ascii")


def _figure(fig, caption: str, name: str, plt) -> str:
    return (
        f'<figure id="fig-{name}"><img alt="{html.escape(caption)}" src="data:image/png;base64,{_png(fig, plt)}">'
        f"<figcaption>{html.escape(caption)}</figcaption></figure>"
    )


def _html_table(header: list[str], body: list[list[str]], table_id: str = "", row_class=None) -> str:
    head = "".join(f"<th>{html.escape(h)}</th>" for h in header)
    rows = []
    for i, cells in enumerate(body):
        tds = []
        for h, c in zip(header, cells):
            wrap = h.startswith(("vs ", "verdict"))
            cls = "num" if h in _NUMERIC else ("flag" if h == "flags" else ("wrap" if wrap else ""))
            tds.append(f'<td class="{cls}">{html.escape(c)}</td>' if cls else f"<td>{html.escape(c)}</td>")
        cls = row_class(i) if row_class else ""
        rows.append(f'<tr class="{cls}">' + "".join(tds) + "</tr>")
    ident = f' id="{table_id}"' if table_id else ""
    return f"<table{ident}><thead><tr>{head}</tr></thead><tbody>{''.join(rows)}</tbody></table>"


def _leaderboard(doc: Leaderboard) -> str:
    header, body = columns(doc)  # the text board's columns: a column the board gains shows here too
    return _html_table(header, body, "leaderboard", lambda i: "top" if doc.rows[i].possibly_best else "")


def _ablation(doc: Leaderboard) -> str:
    if doc.ablation is None:
        return ""
    parts = []
    for title, header, body in ablation_tables(doc.ablation):
        parts.append(f"<h3>{html.escape(title)}</h3>" + _html_table(header, body))
    return '<section id="ablation">' + "".join(parts) + "</section>" if parts else ""


def _settings(grid: Grid, doc: Leaderboard) -> str:
    base = [[path, _text(value)] for path, value in sorted(doc.base_settings.items())]
    baseline = grid.recipe.baseline
    factors = [
        [f.name, ", ".join(f.paths), " | ".join(f.label(i) for i in range(len(f.levels))), f.label(baseline[f.name])]
        for f in grid.recipe.factors
    ]
    varies = (
        _html_table(["factor", "paths", "levels", "baseline"], factors)
        if factors
        else '<p class="sub">No factors: one configuration.</p>'
    )
    return (
        '<section id="settings"><h3>What varies</h3>'
        + varies
        + "<h3>Shared by every configuration (resolved, defaults included)</h3>"
        + _html_table(["setting", "value"], base)
        + "</section>"
    )


def _text(value) -> str:
    """A setting as the recipe would write it."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if value is None:
        return "-"
    if isinstance(value, list):
        return "[" + ", ".join(map(_text, value)) + "]"
    return str(value)


def _environment(grid: Grid, doc: Leaderboard) -> str:
    env = doc.environment
    rows = [["recipe", f"{grid.recipe.path.name} (sha256 {doc.recipe_hash})"]]
    rows += [
        ["data", f"sha256 {fp}" + (f" ({grid.datasets[fp].label})" if fp in grid.datasets else "")]
        for fp in doc.data["fingerprints"]
    ]
    rows += [["test rows", f"fingerprint {fp}"] for fp in doc.data["test_fingerprints"]]
    rows += [["validation", str(doc.protocol.get("variance", "-"))]]
    if env.first:
        rows += [[k, str(v)] for k, v in sorted(env.first.items())]
    note = ""
    if env.distinct > 1:
        note = (
            f'<p class="caution">Stored jobs ran in {env.distinct} differing environments '
            f"(they differ in {', '.join(env.differs_in)}); the first is shown.</p>"
        )
    if env.recipe_versions > 1:
        note += f'<p class="caution">Results come from {env.recipe_versions} versions of the recipe file.</p>'
    return '<section id="environment">' + _html_table(["what", "value"], rows) + note + "</section>"


def _chosen(grid: Grid, doc: Leaderboard) -> list[tuple[str, list[str]]]:
    """The top configurations and the baseline: (legend label, job keys)."""
    ranked = [r for r in doc.rows if r.mean is not None]
    chosen = ranked[:TOP]
    base_levels = tuple(grid.recipe.baseline[f.name] for f in grid.recipe.factors)
    base = next((c for c in grid.configs if c.levels == base_levels), None)
    if base is not None and all(r.config_id != base.id for r in chosen):
        chosen += [r for r in ranked if r.config_id == base.id]
    keys: dict[str, list[str]] = {}
    for job in grid:
        keys.setdefault(job.config.id, []).append(job.key)
    return [
        (
            f"{r.rank}. {r.label}" + (" (baseline)" if base is not None and r.config_id == base.id else ""),
            keys[r.config_id],
        )
        for r in chosen
    ]


def _gradient_series(grid: Grid, store: Store, doc: Leaderboard) -> list[tuple[str, list[float]]]:
    stored = {r.key: r for r in store.jobs({j.key for j in grid})}
    out = []
    for row in doc.rows:
        norms = [
            stored[j.key].diagnostics.get("init_grad_norms")
            for j in grid
            if j.config.id == row.config_id and j.key in stored
        ]
        norms = [n for n in norms if n]
        if norms:
            depth = min(len(n) for n in norms)
            mean = list(np.mean([n[:depth] for n in norms], axis=0))
            zero = " (zero at every layer: not drawn)" if not any(mean) else ""
            out.append((row.label + zero, mean))
    return out


def _figures(grid: Grid, store: Store, doc: Leaderboard, plt) -> list[str]:
    chosen = _chosen(grid, doc)
    curves = store.curves([k for _, keys in chosen for k in keys])
    made = [
        (
            "intervals",
            figures.intervals_figure(doc, plt),
            f"Each configuration's mean {doc.metric} over seeds (point) with its 95% Student-t interval "
            "(whiskers), in rank order; blue: the best, teal: tied with it, grey: behind. Position, not length, "
            "shows the value, so the axis spans the intervals rather than starting at zero.",
        ),
        (
            "curves",
            figures.curves_figure(chosen, curves, grid.metric, plt) if chosen else None,
            f"Per epoch, mean over seeds with the min-max band, for the top {TOP} configurations and the "
            f"baseline: val {grid.metric} (what the board ranks on), training loss and validation loss.",
        ),
        (
            "effects",
            figures.effects_figure(doc, plt),
            f"Main effect of each factor on {doc.metric}: mean over the other factors (point), 95% interval over "
            "seeds (whiskers); brown: the baseline level.",
        ),
        (
            "gradients",
            figures.gradients_figure(_gradient_series(grid, store, doc), plt),
            "Per-layer weight-gradient norm at initialization (log scale), mean over seeds: a steep fall towards "
            "layer 1 is a vanishing gradient.",
        ),
        (
            "sparsity",
            figures.fractions_figure(doc, "zero_fraction", "fraction of weights exactly zero", plt),
            "Weight sparsity at the end of training (exact zeros, e.g. from proximal L1), on the full 0-1 scale.",
        ),
        (
            "dead",
            figures.fractions_figure(doc, "dead_fraction", "fraction of dead ReLU units", plt),
            "ReLU units never active on a probe batch at the end of training, on the full 0-1 scale.",
        ),
        (
            "lr-probe",
            figures.lr_probe_figure(_lr_probes(grid, store), plt),
            "Learning-rate range test of each optimizer (recipe check --lr-probe): smoothed training loss as the "
            "rate grows every mini-batch; circle: where it falls fastest, cross: where it blew up.",
        ),
    ]
    return [_figure(fig, caption, name, plt) for name, fig, caption in made if fig is not None]


def _lr_probes(grid: Grid, store: Store) -> list[dict]:
    from runner.training.lr_probe import probed_jobs

    ids = {ident: optimizer for optimizer, (ident, _) in probed_jobs(grid).items()}
    return list(store.lr_probes(ids).values())


def build_report(grid: Grid, store: Store) -> str:
    try:
        import matplotlib
    except ImportError:
        from runner.errors import UserError

        raise UserError(
            "the report needs matplotlib",
            hint='Install it with: python -m pip install -c constraints.txt -e ".[report]"',
        ) from None

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    doc = leaderboard(grid, store)
    with plt.rc_context({"axes.prop_cycle": matplotlib.cycler(color=figures.PALETTE), "font.size": 9}):
        shown = _figures(grid, store, doc, plt)
    j = doc.jobs
    cautions = "".join(f"<li>{html.escape(c)}</li>" for c in doc.cautions)
    title = html.escape(grid.recipe.name)
    nav = "".join(
        f'<a href="#{a}">{t}</a>'
        for a, t in (
            ("board", "Leaderboard"),
            ("figures", "Figures"),
            ("ablation-h", "Ablation"),
            ("settings-h", "Settings"),
            ("environment-h", "Environment"),
        )
    )
    ablation = _ablation(doc) or '<p class="sub">No ablation tables: the recipe has no factors or no finished jobs.</p>'
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>{title}: recipe report</title>
<style>{_CSS}</style></head><body>
<h1>{title}</h1>
<p class="sub">{html.escape(grid.recipe.description)}</p>
<p class="sub">Ranked by {html.escape(doc.metric)} ({doc.goal.words}).
{len(doc.rows)} configurations, {j.total} jobs: {j.done} done, {j.diverged} diverged, {j.failed} failed,
{j.timeout} timed out, {j.pending} pending. Seeds: {", ".join(map(str, doc.seeds))}.</p>
<nav>{nav}</nav>
<h2 id="board">Leaderboard</h2>
{_leaderboard(doc)}
<div class="caution" id="cautions"><ul>{cautions}</ul></div>
<h2 id="figures">Figures</h2>
{"".join(shown) or '<p class="sub">No finished jobs yet: run the recipe first.</p>'}
<h2 id="ablation-h">Ablation</h2>
{ablation}
<h2 id="settings-h">Settings</h2>
{_settings(grid, doc)}
<h2 id="environment-h">Environment and data</h2>
{_environment(grid, doc)}
{_CHECK}
</body></html>
"""
