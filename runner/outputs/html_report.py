"""A self-contained HTML report: the leaderboard and figures, images embedded as PNG data.

Figures (matplotlib, Agg backend): learning curves (mean over seeds with a min-max band) for
the top configurations and the baseline; each factor's main effect with 95% whiskers;
per-layer gradient norms at initialization on a log scale; weight sparsity and dead-unit
fractions where recorded. Nothing is fetched from the network to view the file.
"""

from __future__ import annotations

import base64
import html
import io

import numpy as np

from runner.evidence.document import Leaderboard
from runner.evidence.leaderboard import leaderboard
from runner.outputs.text import STANDING_HEADER, interval, number, standing
from runner.recipe.grid import Grid
from runner.store.database import Store

__all__ = ["build_report"]

TOP = 3
_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",sans-serif;margin:2rem auto;max-width:1100px;
color:#1d2a33;background:#fbfaf7;line-height:1.45}
h1{font-size:1.6rem;margin-bottom:.2rem}h2{font-size:1.2rem;margin-top:2.2rem;border-bottom:2px solid #d8cfc0}
.sub{color:#5b6770}table{border-collapse:collapse;font-size:.88rem;margin:.6rem 0;width:100%}
th,td{padding:.3rem .55rem;border-bottom:1px solid #e4ddd1;text-align:left;white-space:nowrap}
td.flag,td.vs{white-space:normal;min-width:8rem}
th{background:#efe9df}tr.top td{background:#eef5ec}td.num{text-align:right;font-variant-numeric:tabular-nums}
.flag{color:#9a3412;font-weight:600}.caution{background:#fff4e0;border-left:4px solid #e0a030;padding:.5rem .8rem}
figure{margin:1rem 0}figure img{max-width:100%;border:1px solid #e4ddd1;background:#fff}
figcaption{color:#5b6770;font-size:.85rem}
"""
_CHECK = """<script>
window.addEventListener('load', function () {
  var imgs = Array.prototype.slice.call(document.querySelectorAll('figure img'));
  document.body.setAttribute('data-figures', imgs.length);
  document.body.setAttribute('data-figures-drawn', imgs.filter(function (i) {
    return i.complete && i.naturalWidth > 0; }).length);
});
</script>"""


def _png(fig) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100, bbox_inches="tight")
    import matplotlib.pyplot as plt

    plt.close(fig)
    return base64.b64encode(buf.getvalue()).decode("ascii")


def _figure(fig, caption: str, name: str) -> str:
    return (
        f'<figure id="fig-{name}"><img alt="{html.escape(caption)}" src="data:image/png;base64,{_png(fig)}">'
        f"<figcaption>{html.escape(caption)}</figcaption></figure>"
    )


def _table(doc: Leaderboard) -> str:
    names = doc.factor_names
    head = "".join(
        f"<th>{html.escape(h)}</th>"
        for h in ["rank", *names, "n", "mean", "sd", "95% CI", "test", STANDING_HEADER, "flags"]
    )
    body = []
    for row in doc.rows:
        cells = [str(row.rank or "-"), *[html.escape(row.labels[n]) for n in names], str(row.n)]
        nums = [number(row.mean), number(row.std), interval(row.ci95), number(row.test_mean)]
        flags = ", ".join(f.text for f in row.flags)
        verdict = standing(row, doc.evidence.get("margin"))
        body.append(
            f'<tr class="{"top" if row.possibly_best else ""}">'
            + "".join(f"<td>{c}</td>" for c in cells)
            + "".join(f'<td class="num">{c}</td>' for c in nums)
            + f'<td class="vs">{html.escape(verdict)}</td><td class="flag">{html.escape(flags)}</td></tr>'
        )
    return f'<table id="leaderboard"><thead><tr>{head}</tr></thead><tbody>{"".join(body)}</tbody></table>'


def _curves_figure(grid: Grid, store: Store, doc: dict, plt):
    ranked = [r for r in doc.rows if r.mean is not None]
    chosen = ranked[:TOP]
    base_levels = tuple(grid.recipe.baseline[f.name] for f in grid.recipe.factors)
    base_cfg = next((c for c in grid.configs if c.levels == base_levels), None)
    if base_cfg is not None and all(r.config_id != base_cfg.id for r in chosen):
        chosen += [r for r in doc.rows if r.config_id == base_cfg.id and r.mean is not None]
    if not chosen:
        return None
    jobs = {}
    for job in grid:
        jobs.setdefault(job.config.id, []).append(job.key)
    curves = store.curves([k for r in chosen for k in jobs[r.config_id]])
    fig, axes = plt.subplots(1, 2, figsize=(11, 3.8), sharey=False)
    for row in chosen:
        tag = row.label + (" (baseline)" if base_cfg is not None and row.config_id == base_cfg.id else "")
        for ax, name in zip(axes, ("train_loss", "val_loss")):
            series = [curves[k][name] for k in jobs[row.config_id] if k in curves and name in curves[k]]
            if not series:
                continue
            length = min(len(s) for s in series)
            arr = np.array([[np.nan if v is None else v for v in s[:length]] for s in series], dtype=float)
            epochs = np.arange(1, length + 1)
            (line,) = ax.plot(epochs, np.nanmean(arr, axis=0), label=tag)
            ax.fill_between(epochs, np.nanmin(arr, axis=0), np.nanmax(arr, axis=0), alpha=0.18, color=line.get_color())
    for ax, title in zip(axes, ("training loss", "validation loss")):
        ax.set_title(title)
        ax.set_xlabel("epoch")
        ax.grid(alpha=0.3)
    axes[1].legend(fontsize=8)
    return fig


def _effects_figure(doc: dict, plt):
    effects = doc.ablation.main_effects
    if not any(lvl.mean is not None for e in effects for lvl in e.levels):
        return None
    fig, axes = plt.subplots(1, len(effects), figsize=(max(5, 3.6 * len(effects)), 3.6), squeeze=False)
    for ax, eff in zip(axes[0], effects):
        labels = [lvl.label for lvl in eff.levels]
        means = [lvl.mean if lvl.mean is not None else np.nan for lvl in eff.levels]
        err = [
            [(m - lvl.ci95[0]) if lvl.ci95 else 0 for m, lvl in zip(means, eff.levels)],
            [(lvl.ci95[1] - m) if lvl.ci95 else 0 for m, lvl in zip(means, eff.levels)],
        ]
        colors = ["#8c6d46" if label == eff.baseline else "#3f7f6b" for label in labels]
        ax.bar(range(len(labels)), means, yerr=err, capsize=4, color=colors)
        ax.set_xticks(range(len(labels)), labels, rotation=30, ha="right", fontsize=8)
        ax.set_title(eff.factor, fontsize=10)
        finite = [m for m in means if m == m]
        if finite:
            lo = min(lvl.ci95[0] if lvl.ci95 else m for m, lvl in zip(means, eff.levels) if m == m)
            hi = max(lvl.ci95[1] if lvl.ci95 else m for m, lvl in zip(means, eff.levels) if m == m)
            pad = (hi - lo) * 0.15 or 0.01
            ax.set_ylim(lo - pad, hi + pad)
    axes[0][0].set_ylabel(doc.metric)
    return fig


def _gradients_figure(grid: Grid, store: Store, doc: dict, plt):
    stored = {r.key: r for r in store.jobs({j.key for j in grid})}
    fig, ax = plt.subplots(figsize=(8, 3.8))
    drawn = 0
    for row in doc.rows:
        norms = [
            stored[j.key].diagnostics.get("init_grad_norms")
            for j in grid
            if j.config.id == row.config_id and j.key in stored
        ]
        norms = [n for n in norms if n]
        if not norms:
            continue
        depth = min(len(n) for n in norms)
        mean = np.mean([n[:depth] for n in norms], axis=0)
        mean = np.where(mean > 0, mean, np.nan)
        ax.plot(range(1, depth + 1), mean, marker="o", label=row.label)
        drawn += 1
    if not drawn:
        plt.close(fig)
        return None
    ax.set_yscale("log")
    ax.set_xlabel("layer (1 = input side)")
    ax.set_ylabel("weight-gradient norm at init")
    ax.grid(alpha=0.3, which="both")
    ax.legend(fontsize=7, ncol=2)
    return fig


def _bars_figure(doc: dict, key: str, title: str, plt):
    rows = [r for r in doc.rows if r.diagnostics.get(key) is not None]
    if not rows or not any(r.diagnostics[key] for r in rows):
        return None
    fig, ax = plt.subplots(figsize=(8, 0.35 * len(rows) + 1.2))
    ax.barh([r.label for r in rows], [r.diagnostics[key] for r in rows], color="#3f6f8f")
    ax.invert_yaxis()
    ax.set_xlim(0, 1)
    ax.set_xlabel(title)
    ax.grid(alpha=0.3, axis="x")
    return fig


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
    figures = []
    made = [
        (
            "curves",
            _curves_figure(grid, store, doc, plt),
            f"Loss per epoch, mean over seeds with the min-max band, for the top {TOP} configurations "
            "and the baseline.",
        ),
        (
            "effects",
            _effects_figure(doc, plt),
            f"Main effect of each factor on {doc.metric}: mean over the other factors, 95% interval over seeds "
            "(brown: baseline level).",
        ),
        (
            "gradients",
            _gradients_figure(grid, store, doc, plt),
            "Per-layer weight-gradient norm at initialization (log scale): a steep fall towards layer 1 is a "
            "vanishing gradient.",
        ),
        (
            "sparsity",
            _bars_figure(doc, "zero_fraction", "fraction of weights exactly zero", plt),
            "Weight sparsity at the end of training (exact zeros, e.g. from proximal L1).",
        ),
        (
            "dead",
            _bars_figure(doc, "dead_fraction", "fraction of dead ReLU units", plt),
            "ReLU units never active on a probe batch at the end of training.",
        ),
    ]
    for name, fig, caption in made:
        if fig is not None:
            figures.append(_figure(fig, caption, name))
    j = doc.jobs
    cautions = "".join(f"<li>{html.escape(c)}</li>" for c in doc.cautions)
    title = html.escape(grid.recipe.name)
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>{title}: recipe report</title>
<style>{_CSS}</style></head><body>
<h1>{title}</h1>
<p class="sub">{html.escape(grid.recipe.description)}</p>
<p class="sub">Ranked by {html.escape(doc.metric)} ({doc.goal.words}).
{len(doc.rows)} configurations, {j.total} jobs: {j.done} done, {j.diverged} diverged, {j.failed} failed,
{j.timeout} timed out, {j.pending} pending. Seeds: {", ".join(map(str, doc.seeds))}.</p>
<h2>Leaderboard</h2>
{_table(doc)}
<div class="caution"><ul>{cautions}</ul></div>
<h2>Figures</h2>
{"".join(figures) or '<p class="sub">No finished jobs yet: run the recipe first.</p>'}
{_CHECK}
</body></html>
"""
