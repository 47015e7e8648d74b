"""The report's figures (matplotlib, Agg backend), drawn in the tool's own palette.

Every series gets a colour, a line style and a marker of its own, so overlapping lines stay
apart in print and for readers who do not tell the colours apart. Values are drawn by
position (points with whiskers), never as bars cut off near their tops: a bar's length
reads as the value, so a bar chart whose axis does not start at zero exaggerates.
"""

from __future__ import annotations

import numpy as np

from runner.evidence.document import Leaderboard

__all__ = [
    "INK",
    "PALETTE",
    "curves_figure",
    "effects_figure",
    "fractions_figure",
    "gradients_figure",
    "intervals_figure",
    "style",
]

# The tool's palette: eight hues of differing lightness, chosen to stay apart in greyscale.
PALETTE = ("#23577a", "#d1782c", "#4f8a3c", "#a33b5b", "#6b5ca5", "#2f9c95", "#8c6d46", "#5c6670")
LINES = ("-", "--", "-.", ":")
MARKERS = ("o", "s", "^", "D", "v", "P", "X")  # 8 colours, 7 markers, 4 line styles: 56 distinct series
INK = "#1d2a33"
GRIDLINE = "#d8d2c6"


def style(i: int) -> dict:
    """Colour, line style and marker of series i: no two of the first 56 series share all three."""
    return {"color": PALETTE[i % len(PALETTE)], "linestyle": LINES[i % len(LINES)], "marker": MARKERS[i % len(MARKERS)]}


def _axes_look(ax) -> None:
    ax.grid(color=GRIDLINE, linewidth=0.7)
    ax.set_axisbelow(True)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    for side in ("left", "bottom"):
        ax.spines[side].set_color("#8a8f94")
    ax.tick_params(colors=INK, labelsize=8)


def intervals_figure(doc: Leaderboard, plt):
    """Each configuration's mean with its 95% interval over seeds, in rank order."""
    rows = [r for r in doc.rows if r.mean is not None]
    if not rows:
        return None
    fig, ax = plt.subplots(figsize=(8.5, 0.34 * len(rows) + 1.3))
    for y, row in enumerate(rows):
        color = PALETTE[0] if row.rank == 1 else (PALETTE[5] if row.possibly_best else PALETTE[7])
        if row.ci95:
            ax.plot(row.ci95, [y, y], color=color, linewidth=2.2, solid_capstyle="butt")
            ax.plot(row.ci95, [y, y], linestyle="none", marker="|", markersize=9, color=color)
        ax.plot([row.mean], [y], marker="o", markersize=6, color=color, linestyle="none")
    ax.set_yticks(range(len(rows)), [f"{r.rank}. {r.label}" for r in rows], fontsize=8)
    ax.invert_yaxis()
    lows = [r.ci95[0] if r.ci95 else r.mean for r in rows]
    highs = [r.ci95[1] if r.ci95 else r.mean for r in rows]
    pad = 0.08 * ((max(highs) - min(lows)) or abs(max(highs)) or 1.0)
    ax.set_xlim(min(lows) - pad, max(highs) + pad)
    ax.set_xlabel(f"{doc.metric} ({doc.goal.words})", color=INK)
    _axes_look(ax)
    return fig


def _series(curves: dict, keys: list[str], name: str) -> np.ndarray | None:
    series = [curves[k][name] for k in keys if k in curves and name in curves[k]]
    if not series:
        return None
    length = min(len(s) for s in series)
    return np.array([[np.nan if v is None else v for v in s[:length]] for s in series], dtype=float)


def curves_figure(chosen: list[tuple[str, list[str]]], curves: dict, metric: str, plt):
    """Per epoch, mean over seeds with the min-max band: the rank metric on val, and the
    training and validation losses. ``chosen``: (legend label, its job keys) per configuration."""
    names = [
        (f"val_{metric}", f"val {metric} (the rank metric)"),
        ("train_loss", "training loss"),
        ("val_loss", "validation loss"),
    ]
    fig, axes = plt.subplots(1, 3, figsize=(12.5, 3.7))
    for i, (tag, keys) in enumerate(chosen):
        st = style(i)
        for ax, (name, _) in zip(axes, names):
            arr = _series(curves, keys, name)
            if arr is None:
                continue
            epochs = np.arange(1, arr.shape[1] + 1)
            every = max(1, len(epochs) // 8)
            ax.plot(epochs, np.nanmean(arr, axis=0), label=tag, markevery=every, markersize=4, linewidth=1.6, **st)
            ax.fill_between(
                epochs, np.nanmin(arr, axis=0), np.nanmax(arr, axis=0), alpha=0.13, color=st["color"], linewidth=0
            )
    for ax, (_, title) in zip(axes, names):
        ax.set_title(title, fontsize=10, color=INK)
        ax.set_xlabel("epoch", color=INK)
        ax.xaxis.get_major_locator().set_params(integer=True)
        _axes_look(ax)
    axes[0].legend(fontsize=7, frameon=False)
    return fig


def effects_figure(doc: Leaderboard, plt):
    """Each factor's levels: mean over the other factors with the 95% interval over seeds."""
    effects = doc.ablation.main_effects if doc.ablation else []
    if not any(lvl.mean is not None for e in effects for lvl in e.levels):
        return None
    fig, axes = plt.subplots(1, len(effects), figsize=(max(5.0, 3.6 * len(effects)), 3.4), squeeze=False)
    for ax, eff in zip(axes[0], effects):
        for x, lvl in enumerate(eff.levels):
            if lvl.mean is None:
                continue
            color = PALETTE[6] if lvl.label == eff.baseline else PALETTE[0]
            if lvl.ci95:
                ax.plot([x, x], lvl.ci95, color=color, linewidth=2.2)
                ax.plot([x, x], lvl.ci95, linestyle="none", marker="_", markersize=10, color=color)
            ax.plot([x], [lvl.mean], marker="o", color=color, markersize=6)
        ax.set_xticks(range(len(eff.levels)), [lvl.label for lvl in eff.levels], rotation=30, ha="right", fontsize=8)
        ax.set_xlim(-0.6, len(eff.levels) - 0.4)
        ax.set_title(eff.factor, fontsize=10, color=INK)
        _axes_look(ax)
    axes[0][0].set_ylabel(doc.metric, color=INK)
    return fig


def gradients_figure(series: list[tuple[str, list[float]]], plt):
    """Per-layer weight-gradient norms at initialization, one line per configuration (log scale)."""
    if not series:
        return None
    fig, ax = plt.subplots(figsize=(8.5, 3.8))
    depth = 1
    for i, (label, norms) in enumerate(series):
        mean = np.where(np.asarray(norms) > 0, norms, np.nan)
        ax.plot(range(1, len(mean) + 1), mean, label=label, linewidth=1.5, markersize=5, **style(i))
        depth = max(depth, len(mean))
    ax.set_yscale("log")
    ax.set_xticks(range(1, depth + 1))  # layers are whole numbers
    ax.set_xlim(0.7, depth + 0.3)
    ax.set_xlabel("weighted layer (1 = input side)", color=INK)
    ax.set_ylabel("weight-gradient norm at init", color=INK)
    _axes_look(ax)
    ax.grid(color=GRIDLINE, linewidth=0.5, which="minor", axis="y")
    ax.legend(fontsize=7, frameon=False, loc="upper left", bbox_to_anchor=(1.01, 1.0))  # beside, never over lines
    return fig


def fractions_figure(doc: Leaderboard, key: str, title: str, plt):
    """A fraction per configuration on its full 0-1 scale."""
    rows = [r for r in doc.rows if r.diagnostics.get(key) is not None]
    if not rows or not any(r.diagnostics[key] for r in rows):
        return None
    fig, ax = plt.subplots(figsize=(8.5, 0.34 * len(rows) + 1.2))
    ax.barh([r.label for r in rows], [r.diagnostics[key] for r in rows], color=PALETTE[0], height=0.6)
    ax.invert_yaxis()
    ax.set_xlim(0, 1)
    ax.set_xlabel(title, color=INK)
    _axes_look(ax)
    return fig


def lr_probe_figure(probes: list[dict], plt):
    """Each optimizer's range test: smoothed training loss against the rate (log scale), a
    circle where it falls fastest and a cross where it blew up."""
    if not probes:
        return None
    fig, ax = plt.subplots(figsize=(8.5, 3.6))
    for i, p in enumerate(probes):
        look = style(i)
        ax.plot(p["rates"], p["losses"], label=p["optimizer"], linewidth=1.5, color=look.get("color"))
        for rate, marker in ((p.get("steepest"), "o"), (p.get("blowup"), "x")):
            if rate is not None and p["rates"]:
                at = int(np.argmin(np.abs(np.log(np.asarray(p["rates"])) - np.log(rate))))
                ax.plot([rate], [p["losses"][at]], marker=marker, color=look.get("color"), markersize=7)
    ax.set_xscale("log")
    ax.set_xlabel("learning rate", color=INK)
    ax.set_ylabel("training loss (smoothed)", color=INK)
    _axes_look(ax)
    ax.legend(fontsize=7, frameon=False, loc="upper left", bbox_to_anchor=(1.01, 1.0))
    return fig
