"""summary/render: the leaderboard from the store, in every format, without training."""

import csv
import io
import json

import numpy as np
import pytest
from conftest import invoke
from scipy import stats as st


@pytest.fixture
def finished(tmp_path, tiny_recipe):
    store = tmp_path / "s.sqlite"
    assert invoke("run", tiny_recipe, "--store", store, "--workers", 1, "-q").exit_code == 0
    return tiny_recipe, store


def test_json_document_keys_and_values(finished):
    recipe, store = finished
    result = invoke("board", recipe, "--store", store, "--format", "json")
    assert result.exit_code == 0
    doc = json.loads(result.stdout)
    assert doc["format"] == "recipe-leaderboard" and doc["version"] == 2
    assert doc["metric"] == "val.accuracy" and doc["goal"] == "max"
    assert len(doc["rows"]) == 2
    # each seed redraws train/val: the interval's variance is (1/n + n_val/n_train) s^2
    # (Nadeau & Bengio 2003), with the split sizes the jobs stored
    n_val, n_train = doc["protocol"]["n_val"], doc["protocol"]["n_train"]
    assert (n_val, n_train) == (30, 90)  # iris 150 rows: test 30, then val 0.25 of the other 120
    for row in doc["rows"]:
        assert set(row) >= {"levels", "n", "mean", "std", "ci95", "per_seed", "test_mean", "counts", "possibly_best"}
        values = list(row["per_seed"].values())
        assert row["n"] == 2 and set(row["per_seed"]) == {"1", "2"}
        assert row["mean"] == pytest.approx(np.mean(values))
        assert row["std"] == pytest.approx(np.std(values, ddof=1))
        if row["std"] > 0:
            half = st.t.ppf(0.975, 1) * row["std"] * np.sqrt(1 / 2 + n_val / n_train)  # 12.7062 for 1 df
            assert row["ci95"] == [pytest.approx(row["mean"] - half), pytest.approx(row["mean"] + half)]
    assert len(doc["data"]["test_fingerprints"]) == 1  # one test split for every job
    means = [r["mean"] for r in doc["rows"]]
    assert means == sorted(means, reverse=True)
    assert any("optimistic" in c for c in doc["cautions"])


def test_table_markdown_csv(finished):
    recipe, store = finished
    table = invoke("board", recipe, "--store", store).stdout
    assert "train.optimizer" in table and "95% CI" in table and "optimistic" in table
    md = invoke("board", recipe, "--store", store, "--format", "markdown").stdout
    assert "| rank | train.optimizer |" in md
    rows = list(csv.DictReader(io.StringIO(invoke("board", recipe, "--store", store, "--format", "csv").stdout)))
    assert len(rows) == 2 and {"seed_1", "seed_2", "ci95_low"} <= set(rows[0])


def test_board_without_store_is_a_clear_error(tiny_recipe, tmp_path):
    result = invoke("board", tiny_recipe, "--store", tmp_path / "none.sqlite")
    assert result.exit_code == 2 and "no results store here yet" in result.stderr
    assert not (tmp_path / "none.sqlite").exists()


def test_status_counts(finished):
    recipe, store = finished
    assert "4 jobs: 4 done" in invoke("status", recipe, "--store", store).stdout


def test_pending_jobs_are_shown_as_absent(tmp_path, tiny_recipe):
    store = tmp_path / "s.sqlite"
    invoke("run", tiny_recipe, "--store", store, "--workers", 1, "-q")
    tiny_recipe.write_text(tiny_recipe.read_text().replace('["sgd", "adam"]', '["sgd", "adam", "adagrad"]'))
    doc = json.loads(invoke("board", tiny_recipe, "--store", store, "--format", "json").stdout)
    pending = [r for r in doc["rows"] if r["levels"]["train.optimizer"] == "adagrad"][0]
    assert pending["n"] == 0 and pending["mean"] is None and pending["rank"] is None
    assert pending["counts"]["pending"] == 2


def test_header_says_when_stored_jobs_ran_in_different_environments(finished):
    """Each job keeps its environment; the board's header names what differs."""
    import sqlite3

    recipe, store = finished
    with sqlite3.connect(store) as c:
        key, env = c.execute("SELECT key, env FROM jobs LIMIT 1").fetchone()
        env = json.loads(env)
        assert {"python", "torch", "numpy", "sklearn", "threads", "cpu"} <= set(env)
        env["torch"] = "0.0.1-elsewhere"
        c.execute("UPDATE jobs SET env = ? WHERE key = ?", (json.dumps(env), key))
    table = invoke("board", recipe, "--store", store).stdout
    assert "Note: stored jobs ran in differing environments (torch)." in table
    doc = json.loads(invoke("board", recipe, "--store", store, "--format", "json").stdout)
    assert doc["environment"]["distinct"] == 2 and doc["environment"]["differs_in"] == ["torch"]


def test_retry_failed_reruns_only_failed_jobs(finished):
    import sqlite3

    recipe, store = finished
    with sqlite3.connect(store) as c:
        rows = dict(c.execute("SELECT key, finished FROM jobs"))
        failed = next(iter(rows))
        c.execute("UPDATE jobs SET status = 'failed', error = 'made to fail here' WHERE key = ?", (failed,))
    plain = invoke("run", recipe, "--store", store, "--workers", 1)
    assert "4 jobs, 4 done, 0 to run" in plain.stderr  # a failed job is finished: not rerun by default
    again = invoke("run", recipe, "--store", store, "--workers", 1, "--retry-failed")
    assert "4 jobs, 3 done, 1 to run" in again.stderr
    with sqlite3.connect(store) as c:
        after = dict(c.execute("SELECT key, finished FROM jobs"))
        assert c.execute("SELECT status FROM jobs WHERE key = ?", (failed,)).fetchone()[0] == "done"
    assert all(after[k] == rows[k] for k in rows if k != failed) and after[failed] != rows[failed]
