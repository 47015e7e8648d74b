"""progress: a stacked group reports its epochs while it trains, in this process and from a
worker process, and the live line moves with them before any job of the group finishes."""

import io
import textwrap

import pytest

from runner.execution import executors
from runner.execution.executors import PoolExecutor, SerialExecutor
from runner.execution.progress import Progress
from runner.recipe.grid import expand
from runner.recipe.loader import parse_recipe
from runner.training.grouping import group_specs

GROUP = """
name = "progress"
seeds = [1, 2, 3, 4]
[data]
source = "{source}"
[model]
hidden = [64, 64]
[train]
batch_size = 32
epochs = {epochs}
"""


def _group(tmp_path, source: str, epochs: int):
    grid = expand(parse_recipe(textwrap.dedent(GROUP.format(source=source, epochs=epochs)), tmp_path / "p.toml"))
    items = group_specs([j.spec() for j in grid], grid.datasets)
    assert len(items) == 1 and len(items[0]) == 4
    return items, grid.datasets


def _events(executor, items, datasets) -> list:
    events = []
    executor.run(
        items,
        datasets,
        lambda spec, result, attempts: events.append(("result", spec.key)),
        on_progress=lambda item, share: events.append(("epoch", share)),
    )
    return events


def test_a_group_reports_each_epoch_before_its_results(tmp_path, monkeypatch):
    monkeypatch.setattr(executors, "PROGRESS_EVERY", 0.0)  # every epoch, however quick
    items, datasets = _group(tmp_path, "iris", epochs=5)
    events = _events(SerialExecutor(), items, datasets)
    assert events[:5] == [("epoch", e / 5) for e in range(1, 6)]
    assert [kind for kind, _ in events[5:]] == ["result"] * 4


@pytest.mark.slow
def test_a_worker_process_reports_progress_of_a_long_group(tmp_path):
    items, datasets = _group(tmp_path, "digits", epochs=40)  # seconds of training: several reports
    events = _events(PoolExecutor(1), items, datasets)
    shares = [share for kind, share in events if kind == "epoch"]
    assert shares and all(0 < s <= 1 for s in shares) and shares == sorted(shares)
    assert events.index(("epoch", shares[0])) < min(i for i, (kind, _) in enumerate(events) if kind == "result")


def test_the_live_line_counts_jobs_in_training():
    out = io.StringIO()
    progress = Progress(8, "val.accuracy", "max", stream=out, live=True)
    progress.advance(("a", "b", "c", "d"), 0.5)
    assert "\r\033[K[0/8] (+2.0 in training) failed 0, diverged 0 | " in out.getvalue()
    progress.update("x", 1, "done", 0.9, 0.1, key="a")  # the group's results arrive
    assert "in training" not in out.getvalue().rsplit("\r", 1)[-1] and progress.partial == {}
