"""figures: series stay distinguishable, intervals are points with whiskers (no truncated
bars), gradient plots tick whole layers."""

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt
from matplotlib.colors import to_hex

from runner.components.metrics import Goal
from runner.evidence.document import Counts, Environment, Leaderboard, Row, Verdict
from runner.outputs import figures


def _row(rank, mean, ci):
    return Row(
        config_id=str(rank),
        levels={},
        labels={"f": f"level{rank}"},
        n=3,
        mean=mean,
        std=0.01,
        ci95=ci,
        per_seed={},
        test_mean=None,
        test_per_seed={},
        counts=Counts(done=3),
        diagnostics={},
        flags=[],
        rank=rank,
        verdict=Verdict("possibly_best" if rank == 1 else "behind", 0.0, -0.01, 0.01),
    )


def _doc(rows):
    return Leaderboard(
        recipe="r",
        recipe_hash="h",
        description="",
        metric="val.accuracy",
        goal=Goal.MAX,
        test_metric="test.accuracy",
        task="classification",
        seeds=[1, 2, 3],
        factors=[],
        base_settings={},
        data={"fingerprints": [], "test_fingerprints": []},
        protocol={},
        evidence={},
        monitor="accuracy",
        jobs=Counts(),
        rows=rows,
        ablation=None,
        environment=Environment(1, [], None, 1),
        cautions=[],
    )


def test_first_56_series_differ_in_colour_line_or_marker():
    seen = {tuple(figures.style(i).values()) for i in range(56)}
    assert len(seen) == 56
    assert not {to_hex(c) for c in figures.PALETTE} & {"#1f77b4", "#ff7f0e", "#2ca02c", "#d62728"}  # not matplotlib's


def test_intervals_are_points_with_whiskers_covering_every_interval():
    rows = [_row(1, 0.97, [0.95, 0.99]), _row(2, 0.96, [0.93, 0.99]), _row(3, 0.90, [0.80, 0.99])]
    fig = figures.intervals_figure(_doc(rows), plt)
    ax = fig.axes[0]
    assert not ax.patches  # no bars whose length would read as the value
    lo, hi = ax.get_xlim()
    assert lo < 0.80 and hi > 0.99
    plt.close(fig)


def test_gradient_plot_ticks_whole_layers():
    fig = figures.gradients_figure([("a", [1e-3, 1e-2, 1e-1, 1.0, 2.0]), ("b", [0.5, 0.4, 0.3, 0.2, 0.1])], plt)
    ticks = fig.axes[0].get_xticks()
    assert list(ticks) == [1, 2, 3, 4, 5]
    lines = fig.axes[0].get_lines()
    assert lines[0].get_linestyle() != lines[1].get_linestyle() and lines[0].get_marker() != lines[1].get_marker()
    plt.close(fig)
