"""check, new, completion and progress: the commands around a run."""

import io
import re
import subprocess

import pytest
from conftest import DATA, PYTHON, ROOT, invoke, subprocess_env, write_recipe

from runner.execution.progress import Progress

RECIPE = """
    name = "plan"
    seeds = [1, 2, 3]
    [data]
    source = "iris"
    [model]
    hidden = [8]
    [train]
    epochs = 3
    [factors]
    "train.optimizer" = ["sgd", "adam"]
"""


def test_check_counts_on_a_partly_finished_store(tmp_path):
    path = write_recipe(tmp_path, RECIPE)
    store = tmp_path / "s.sqlite"
    assert invoke("run", path, "--store", store, "--workers", 1, "-q").exit_code == 0
    path.write_text(path.read_text().replace('["sgd", "adam"]', '["sgd", "adam", "adagrad"]'))
    result = invoke("check", path, "--store", store, "--workers", 2)
    assert result.exit_code == 0, result.stderr
    out = result.stdout
    assert "3 configurations x 3 seeds = 9 jobs: 6 done, 0 diverged, 0 failed, 0 timed out, 3 to run" in out
    assert "train.optimizer: sgd (baseline), adam, adagrad" in out
    assert re.search(r"estimated run time: (about \d+ s|under a second) of training with 2 worker\(s\), stacked", out)
    quiet = invoke("check", path, "--store", store, "--no-probe").stdout
    assert "estimated" not in quiet


def test_check_without_store_and_on_a_bad_recipe(tmp_path):
    path = write_recipe(tmp_path, RECIPE)
    assert "0 done" in invoke("check", path, "--store", tmp_path / "none.sqlite", "--no-probe").stdout
    assert not (tmp_path / "none.sqlite").exists()
    bad = invoke("check", DATA / "negative_lr.toml")
    assert bad.exit_code == 2 and "train.lr" in bad.stderr


def test_new_writes_a_valid_starter_for_a_csv(tmp_path):
    out = tmp_path / "kiln.toml"
    result = invoke("new", ROOT / "data" / "kiln_batches.csv", "--out", out)
    assert result.exit_code == 0, result.stderr
    text = out.read_text()
    assert 'target = "outcome"' in text and "guessed (classification)" in text
    assert invoke("check", out, "--no-probe").exit_code == 0
    again = invoke("new", ROOT / "data" / "kiln_batches.csv", "--out", out)
    assert again.exit_code == 2 and "file exists" in again.stderr


def test_new_for_a_regression_csv_and_images(tmp_path):
    lines = (DATA / "iris_sample.csv").read_text().splitlines()
    (tmp_path / "num.csv").write_text("\n".join(l.rsplit(",", 1)[0] for l in lines[1:]) + "\n")
    assert invoke("new", tmp_path / "num.csv", "--out", tmp_path / "n.toml").exit_code == 0
    assert 'target = "petal_width"   # guessed (regression)' in (tmp_path / "n.toml").read_text()
    assert invoke("new", "digits", "--out", tmp_path / "d.toml").exit_code == 0
    assert 'kind = "cnn"' in (tmp_path / "d.toml").read_text()


@pytest.mark.slow
def test_shell_completion_script_from_click():
    env = subprocess_env()
    env["_RECIPE_COMPLETE"] = "bash_source"
    proc = subprocess.run([PYTHON, "-m", "runner"], env=env, capture_output=True, text=True)
    assert proc.returncode == 0 and "_RECIPE_COMPLETE" in proc.stdout and "complete " in proc.stdout


def test_progress_live_line_and_plain_lines():
    live = io.StringIO()
    p = Progress(4, "val.accuracy", "max", stream=live, live=True)
    p.update("adam", 1, "done", 0.9, 1.0)
    p.update("sgd", 1, "failed", None, 1.0, "ValueError: x")
    assert "\r" in live.getvalue() and "[2/4] failed 1, diverged 0" in live.getvalue()
    assert "best adam: 0.9000" in live.getvalue()
    plain = io.StringIO()
    p = Progress(2, "val.accuracy", "max", stream=plain, live=False, verbose=True)
    p.update("sgd", 3, "failed", None, 0.5, "ValueError: x")
    assert plain.getvalue().splitlines() == ["[1/2] failed   sgd seed 3  (0.5s; ~0:00 left)", "    ValueError: x"]
    p.update("adam", 1, "done", 0.9, 0.045)  # a stacked job's share of its group's time
    assert plain.getvalue().splitlines()[-1].startswith("[2/2] done     adam seed 1 val.accuracy=0.9000 (0.045s;")
    quiet = io.StringIO()
    Progress(2, "val.accuracy", "max", stream=quiet, quiet=True).update("a", 1, "done", 0.5, 0.1)
    assert quiet.getvalue() == ""


def test_run_says_how_its_jobs_will_train(tmp_path):
    """A line before the jobs' lines: stacked groups (sgd and adam share one here: the stack
    key holds shapes, not optimizers) or, with --no-stack, every job on its own."""
    path = write_recipe(tmp_path, RECIPE)
    stacked = invoke("run", path, "--store", tmp_path / "a.sqlite", "--workers", 1)
    assert stacked.exit_code == 0, stacked.stderr
    assert "6 jobs, 0 done, 6 to run\ntraining 1 stacked group of 6 jobs in this process\n[1/6]" in stacked.stderr
    alone = invoke("run", path, "--store", tmp_path / "b.sqlite", "--workers", 1, "--no-stack")
    assert "training 6 jobs one at a time in this process\n" in alone.stderr
    again = invoke("run", path, "--store", tmp_path / "a.sqlite", "--workers", 1)
    assert "training" not in again.stderr  # nothing left to run
    quiet = invoke("run", path, "--store", tmp_path / "c.sqlite", "--workers", 1, "-q")
    assert "training" not in quiet.stderr


def test_describe_counts_groups_and_single_jobs():
    from runner.training.grouping import Stacked
    from runner.training.grouping import training_note as describe

    assert (
        describe([Stacked("abcdefghi"), Stacked("abcdefghij"), ("x",), ("y",)])
        == "training 2 stacked groups of 9-10 jobs, 2 jobs one at a time"
    )
    assert describe([Stacked("a")]) == "training 1 stacked group of 1 job"


def test_on_option_is_checked_like_the_recipes_run_on(tmp_path):
    """`--on` typos get the same rule and wording as `[run] on` in a recipe, as one line."""
    path = write_recipe(tmp_path, RECIPE)
    in_recipe = write_recipe(tmp_path, RECIPE + '\n[run]\non = "dask-locl"\n', "bad.toml")
    rule = invoke("check", in_recipe, "--no-probe").stderr.split("allowed: ", 1)[1]
    for typo in ("dask-locl", "foo", "dask://nohost", "local "):
        result = invoke("run", path, "--on", typo, "--store", tmp_path / "s.sqlite")
        assert result.exit_code == 2 and result.stderr.startswith("error: --on: ")
        assert len(result.stderr.strip().splitlines()) == 1 and "Traceback" not in result.stderr
        assert result.stderr.split("allowed: ", 1)[1].split(".")[0] == rule.split(".")[0]
    assert not (tmp_path / "s.sqlite").exists()


def test_option_errors_are_one_line_with_exit_2(tmp_path):
    """click's own checks (ranges, choices, unknown options, a missing argument) answer in
    the tool's one-line form; a non-finite time limit is refused like a negative one."""
    path = write_recipe(tmp_path, RECIPE)
    cases = {
        ("--workers", "0"): "--workers",
        ("--threads", "100000"): "--threads",
        ("--time-limit", "nan"): "not a finite number",
        ("--time-limit", "inf"): "not a finite number",
        ("--format", "xml"): "--format",
        ("--wrokers", "2"): "--workers",
    }
    for args, words in cases.items():
        result = invoke("run", path, *args, "--store", tmp_path / "s.sqlite")
        assert result.exit_code == 2 and result.stderr.startswith("error: "), result.output
        assert len(result.stderr.strip().splitlines()) == 1 and words in result.stderr, result.stderr
    missing = invoke("run")
    assert missing.exit_code == 2 and missing.stderr.startswith("error: Missing argument 'RECIPE'")
    assert invoke("--version").exit_code == 0 and invoke("run", "-h").exit_code == 0
    assert not (tmp_path / "s.sqlite").exists()
