"""loop: the one training loop. A stacked group that fails is retrained one job at a time
and says so (a warning line, a note on each job); it never hides as a slower run."""

import json
import sqlite3

from conftest import invoke


def test_a_failing_stacked_group_is_retrained_and_says_so(tmp_path, tiny_recipe, monkeypatch):
    monkeypatch.setenv("RECIPE_FAULT", "stacked@1")
    store = tmp_path / "s.sqlite"
    result = invoke("run", tiny_recipe, "--store", store, "--workers", 1)
    assert result.exit_code == 0, result.stderr
    warnings = [line for line in result.stderr.splitlines() if line.startswith("warning:")]
    assert len(warnings) == 1 and "the stacked path failed" in warnings[0]
    assert "fault injected into the stacked path" in warnings[0] and "trained on its own instead" in warnings[0]
    with sqlite3.connect(store) as c:
        rows = c.execute("SELECT status, diagnostics FROM jobs").fetchall()
    assert len(rows) == 4 and {status for status, _ in rows} == {"done"}
    for _, diagnostics in rows:
        notes = json.loads(diagnostics)["notes"]
        assert len(notes) == 1 and "trained on its own" in notes[0]


def test_without_a_fault_no_warning_and_no_note(tmp_path, tiny_recipe):
    store = tmp_path / "s.sqlite"
    result = invoke("run", tiny_recipe, "--store", store, "--workers", 1)
    assert result.exit_code == 0 and "warning:" not in result.stderr
    with sqlite3.connect(store) as c:
        assert all("notes" not in json.loads(d) for (d,) in c.execute("SELECT diagnostics FROM jobs"))
