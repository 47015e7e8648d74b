"""export/predict: a study's network leaves as a bundle and its predictions reproduce the
stored metrics; retrained weights equal kept ones bit for bit; bundles load without running
code and reject damage with one line."""

import csv
import json
import sqlite3
import statistics

import numpy as np
import pytest
import torch
from conftest import ROOT, invoke, write_recipe
from safetensors.numpy import load_file
from scipy.special import softmax
from sklearn.metrics import accuracy_score, f1_score, log_loss
from sklearn.model_selection import train_test_split
from sklearn.preprocessing import StandardScaler

KILN = ROOT / "data" / "kiln_batches.csv"  # synthetic demo data (data/make_kiln_batches.py)

RECIPE = f"""
    name = "kiln-export"
    seeds = [1, 2, 3]
    [data]
    source = "{KILN}"
    target = "outcome"
    [model]
    hidden = [16, 16]
    [train]
    epochs = 6
    lr = 0.01
    [run]
    keep_weights = "all"
    [factors]
    "train.optimizer" = ["sgd", "adam"]
"""


def board(path, store):
    result = invoke("board", path, "--store", store, "--format", "json")
    assert result.exit_code == 0, result.stderr
    return json.loads(result.stdout)


def read_preds(path):
    with open(path, newline="") as f:
        return list(csv.DictReader(f))


def test_export_then_predict_reproduces_the_stored_test_metrics(tmp_path):
    """recipe -> board -> bundle -> predictions: the test rows' predictions give the stored
    test metrics, counted by sklearn.metrics from the predictions file."""
    path = write_recipe(tmp_path, RECIPE)
    store = tmp_path / "s.sqlite"
    assert invoke("run", path, "--store", store, "--workers", 1, "--no-stack", "-q").exit_code == 0
    doc = board(path, store)
    best = doc["rows"][0]
    out = tmp_path / "bundle"
    exported = invoke("export", path, "--store", store, "--out", out)
    assert exported.exit_code == 0, exported.stderr
    desc = json.loads((out / "model.json").read_text())
    seed = desc["source"]["seed"]
    assert desc["source"]["config_id"] == best["config_id"] and desc["source"]["weights"] == "kept"
    # the default seed is the one whose val score is the configuration's median (3 seeds)
    assert best["per_seed"][str(seed)] == statistics.median(best["per_seed"].values())
    preds = tmp_path / "preds.csv"
    predicted = invoke("predict", out, KILN, "--out", preds)
    assert predicted.exit_code == 0, predicted.stderr
    rows = read_preds(preds)
    assert len(rows) == 1200 and {r["split"] for r in rows} == {"train", "val", "test"}
    test = [r for r in rows if r["split"] == "test"]
    classes = desc["preprocessing"]["classes"]
    y = [r["outcome"] for r in test]
    assert accuracy_score(y, [r["predicted"] for r in test]) == best["test_per_seed"][str(seed)]
    stored = desc["metrics"]["test"]
    assert f1_score(y, [r["predicted"] for r in test], average="macro", zero_division=0) == pytest.approx(
        stored["f1_macro"], abs=1e-15
    )
    probs = np.array([[float(r[f"p_{c}"]) for c in classes] for r in test])
    # sklearn sums in file order, the tool in the split's order: equal to rounding
    assert log_loss(y, probs, labels=classes) == pytest.approx(stored["log_loss"], rel=1e-12)
    line = next(ln for ln in predicted.stdout.splitlines() if ln.startswith("test,"))
    assert line.count("(stored: the same)") == 3  # every test metric, the very same number


def _numpy_forward(weights, X):
    """The MLP by hand from the safetensors file: relu(x W^T + b) per hidden layer."""
    layers = sorted({k.rsplit(".", 1)[0] for k in weights}, key=lambda s: int(s))
    h = X
    for i, name in enumerate(layers):
        h = h @ weights[f"{name}.weight"].T.astype(np.float64) + weights[f"{name}.bias"]
        if i < len(layers) - 1:
            h = np.maximum(h, 0.0)
    return h


def test_loaded_bundle_is_an_ordinary_module_matching_its_weights(tmp_path):
    """load_bundle gives a torch.nn.Module whose outputs equal the network computed by hand
    from the weights file (numpy) and probabilities equal to scipy's softmax."""
    from runner.outputs.predict import load_bundle

    path = write_recipe(tmp_path, RECIPE)
    store = tmp_path / "s.sqlite"
    assert invoke("run", path, "--store", store, "--workers", 1, "-q").exit_code == 0
    out = tmp_path / "b"
    assert invoke("export", path, "--store", store, "--rank", 2, "--out", out).exit_code == 0
    predictor = load_bundle(out)
    assert isinstance(predictor.module, torch.nn.Module) and not predictor.module.training
    X = np.loadtxt(KILN, delimiter=",", skiprows=3, usecols=range(6), max_rows=50, dtype=np.float32)
    pre = predictor.bundle.inputs
    scaled = (X - np.array(pre.subtract, np.float32)) / np.array(pre.divide_by, np.float32)
    by_hand = _numpy_forward(load_file(out / "weights.safetensors"), scaled.astype(np.float64))
    with torch.no_grad():
        logits = predictor.module(torch.from_numpy(scaled)).numpy()
    assert np.allclose(logits, by_hand, rtol=1e-5, atol=1e-5)
    assert np.allclose(predictor.predict_proba(X), softmax(by_hand, axis=1), atol=1e-6)


def _split_rows_by_sklearn(y, seed, val=0.2, test=0.2):
    idx = np.arange(len(y))
    rest, test_idx = train_test_split(idx, test_size=test, random_state=0, stratify=y)  # data.split.test_seed 0
    train, val_idx = train_test_split(rest, test_size=val / (1 - test), random_state=seed, stratify=y[rest])
    return train, val_idx, test_idx


def test_refit_trains_on_train_plus_val_for_the_median_chosen_epoch(tmp_path):
    """--refit: epochs = median of the seeds' early-stopping epochs; the scaler is fitted on
    the seed's train+val rows (rows by sklearn's train_test_split, scaler by StandardScaler)."""
    text = RECIPE.replace("epochs = 6", "epochs = 40\n    patience = 3").replace('"all"', '"none"')
    path = write_recipe(tmp_path, text)
    store = tmp_path / "s.sqlite"
    assert invoke("run", path, "--store", store, "--workers", 1, "-q").exit_code == 0
    doc = board(path, store)
    out = tmp_path / "refit"
    result = invoke("export", path, "--store", store, "--refit", "--out", out)
    assert result.exit_code == 0, result.stderr
    desc = json.loads((out / "model.json").read_text())
    with sqlite3.connect(store) as c:
        chosen = [
            e for (e,) in c.execute("SELECT best_epoch FROM jobs WHERE config_id = ?", (doc["rows"][0]["config_id"],))
        ]
    assert desc["source"]["epochs"] == int(np.floor(statistics.median(chosen) + 0.5))
    assert "val" not in desc["metrics"] and "test" in desc["metrics"]
    data = np.genfromtxt(KILN, delimiter=",", skip_header=3, dtype=None, encoding="utf-8")
    X = np.array([list(r)[:6] for r in data], dtype=np.float32)
    labels = np.array([r[6] for r in data])
    train, val, _ = _split_rows_by_sklearn(labels, desc["source"]["seed"])
    reference = StandardScaler().fit(X[np.concatenate([train, val])].astype(np.float64))
    assert np.allclose(desc["preprocessing"]["subtract"], reference.mean_, rtol=1e-5)
    assert np.allclose(desc["preprocessing"]["divide_by"], reference.scale_, rtol=1e-5)
    assert "Refit on train+val" in (out / "card.md").read_text()


def test_damaged_or_foreign_bundles_are_refused_in_one_line(tmp_path):
    path = write_recipe(tmp_path, RECIPE)
    store = tmp_path / "s.sqlite"
    assert invoke("run", path, "--store", store, "--workers", 1, "-q").exit_code == 0
    out = tmp_path / "b"
    assert invoke("export", path, "--store", store, "--out", out).exit_code == 0
    preds = tmp_path / "p.csv"
    bad_csv = tmp_path / "bad.csv"
    bad_csv.write_text("peak_temp_c,ramp_c_per_h\n1,2\n")
    missing = invoke("predict", out, bad_csv, "--out", preds)
    assert missing.exit_code == 2 and "feature columns" in missing.stderr and "soak_min" in missing.stderr
    assert len(missing.stderr.strip().splitlines()) == 1
    desc = json.loads((out / "model.json").read_text())
    desc["network"]["model"]["activation"] = "swish"
    (out / "model.json").write_text(json.dumps(desc))
    wrong = invoke("predict", out, KILN, "--out", preds)
    assert wrong.exit_code == 2 and "network.model.activation" in wrong.stderr and '"swish"' in wrong.stderr
    assert invoke("export", path, "--store", store, "--out", out).exit_code == 0
    blob = bytearray((out / "weights.safetensors").read_bytes())
    blob[-3] ^= 0xFF
    (out / "weights.safetensors").write_bytes(bytes(blob))
    damaged = invoke("predict", out, KILN, "--out", preds)
    assert damaged.exit_code == 2 and "does not match" in damaged.stderr and not preds.exists()
    nothing = invoke("predict", tmp_path, KILN, "--out", preds)
    assert nothing.exit_code == 2 and "not a model bundle" in nothing.stderr
    bad_choice = invoke("export", path, "--store", store, "--config", "rmsprop", "--out", out)
    assert bad_choice.exit_code == 2 and '"adam"' in bad_choice.stderr and '"sgd"' in bad_choice.stderr


BIT_RECIPE = """
    name = "bits"
    seeds = [1, 2]
    [data]
    source = "wine"
    [model]
    hidden = [16]
    dropout = 0.1
    [train]
    epochs = 4
    [run]
    keep_weights = "{keep}"
    [factors.path]   # a stacked group, and single jobs (checkpoints keep a job off the stacked path)
    labels = ["stacked", "single"]
    "train.checkpoint_every" = [0, 2]
    "model.batch_norm" = [false, true]
    [factors]
    "train.lr" = [0.01, 0.003]
"""


@pytest.mark.slow
def test_retrained_weights_equal_the_kept_ones_bit_for_bit(tmp_path):
    """Weights kept by worker processes and weights retrained in-process (a stacked group
    retrained whole, a single job alone) are the same bytes; the retrain reproduces every
    stored metric."""
    kept = write_recipe(tmp_path, BIT_RECIPE.format(keep="all"), "kept.toml")
    none = write_recipe(tmp_path, BIT_RECIPE.format(keep="none"), "none.toml")
    for path in (kept, none):
        result = invoke("run", path, "--store", tmp_path / f"{path.stem}.sqlite", "--workers", 2, "-q")
        assert result.exit_code == 0, result.stderr
    with sqlite3.connect(tmp_path / "none.sqlite") as c:
        assert c.execute("SELECT count(*) FROM weights").fetchone()[0] == 0
    for config in ("stacked, 0.003", "single, 0.01"):
        for seed in (1, 2):
            a, b = tmp_path / f"a{config}{seed}", tmp_path / f"b{config}{seed}"
            assert (
                invoke(
                    "export", kept, "--store", tmp_path / "kept.sqlite", "--config", config, "--seed", seed, "--out", a
                ).exit_code
                == 0
            )
            again = invoke(
                "export", none, "--store", tmp_path / "none.sqlite", "--config", config, "--seed", seed, "--out", b
            )
            assert again.exit_code == 0 and "every stored metric reproduced" in again.stdout
            assert ("stacked group of 4" in again.stdout) == (config.startswith("stacked"))
            assert (a / "weights.safetensors").read_bytes() == (b / "weights.safetensors").read_bytes()


def test_possibly_best_keeps_only_those_configurations_weights(tmp_path):
    """The default keeps the weights of the configurations the board cannot rule out as best."""
    path = write_recipe(tmp_path, RECIPE.replace('keep_weights = "all"', ""))
    store = tmp_path / "s.sqlite"
    result = invoke("run", path, "--store", store, "--workers", 1)
    assert result.exit_code == 0
    doc = board(path, store)
    # the possibly-best set, and rows without a verdict yet whose seeds all finished
    wanted = {
        r["config_id"] for r in doc["rows"] if r["possibly_best"] or (r["possibly_best"] is None and r["complete"])
    }
    with sqlite3.connect(store) as c:
        kept = {cid for (cid,) in c.execute("SELECT j.config_id FROM weights w JOIN jobs j ON j.key = w.job_key")}
        count = c.execute("SELECT count(*) FROM weights").fetchone()[0]
    assert kept == wanted and count == 3 * len(wanted)
    assert f"weights kept for {count} jobs" in result.stderr


def test_damaged_kept_weights_are_not_trusted_but_retrained(tmp_path):
    """A kept blob whose bytes no longer match their hash is never used: the export retrains
    the job, and gets the very weights that were kept."""
    path = write_recipe(tmp_path, RECIPE)
    store = tmp_path / "s.sqlite"
    assert invoke("run", path, "--store", store, "--workers", 1, "-q").exit_code == 0
    out = tmp_path / "kept"
    assert invoke("export", path, "--store", store, "--seed", 2, "--out", out).exit_code == 0
    key = json.loads((out / "model.json").read_text())["source"]["job_key"]
    with sqlite3.connect(store) as c:
        c.execute("UPDATE weights SET data = substr(data, 1, length(data) - 8) WHERE job_key = ?", (key,))
    again = tmp_path / "again"
    result = invoke("export", path, "--store", store, "--seed", 2, "--out", again)
    assert result.exit_code == 0 and "retrained" in result.stdout and "every stored metric reproduced" in result.stdout
    assert (again / "weights.safetensors").read_bytes() == (out / "weights.safetensors").read_bytes()


@pytest.mark.slow
def test_killed_run_leaves_only_whole_weights(tmp_path):
    """SIGKILL part-way: every stored weights blob belongs to a stored job and matches its
    hash (the blob is written in the job's own transaction); the resumed run completes."""
    import hashlib
    import os
    import signal
    import subprocess
    import time

    from conftest import PYTHON, subprocess_env
    from safetensors.numpy import load

    path = write_recipe(
        tmp_path, RECIPE.replace("epochs = 6", "epochs = 300").replace("seeds = [1, 2, 3]", "seeds = [1, 2, 3, 4]")
    )
    store = tmp_path / "s.sqlite"
    args = [PYTHON, "-m", "runner", "run", str(path), "--store", str(store), "--workers", "2", "--no-stack", "-q"]
    proc = subprocess.Popen(
        args, env=subprocess_env(), stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True
    )
    deadline = time.monotonic() + 300
    while time.monotonic() < deadline:
        try:
            with sqlite3.connect(store, timeout=1) as c:
                if c.execute("SELECT count(*) FROM weights").fetchone()[0] >= 2:
                    break
        except sqlite3.OperationalError:
            pass
        time.sleep(0.05)
    os.killpg(proc.pid, signal.SIGKILL)
    proc.wait(timeout=60)
    with sqlite3.connect(store) as c:
        assert c.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        rows = c.execute(
            "SELECT w.job_key, w.sha256, w.data, j.key FROM weights w LEFT JOIN jobs j ON j.key = w.job_key"
        ).fetchall()
    assert rows and all(job is not None for _, _, _, job in rows)
    for _, sha, data, _ in rows:
        assert hashlib.sha256(data).hexdigest() == sha and load(bytes(data))
    resumed = subprocess.run(args, env=subprocess_env(), capture_output=True, timeout=900)
    assert resumed.returncode == 0
    with sqlite3.connect(store) as c:
        assert c.execute("SELECT count(*) FROM weights").fetchone()[0] == 8


def test_bundle_encodes_text_and_empty_cells_as_training_did(tmp_path):
    """A table with text and empty cells: the bundle carries the training split's fills and
    one-hot columns, so predicting the raw CSV gives the stored test accuracy exactly
    (counted by sklearn.metrics from the predictions file)."""
    from test_encoding import greenhouse

    greenhouse(tmp_path / "g.csv", n=240)
    path = write_recipe(
        tmp_path,
        """
        name = "greenhouse-export"
        seeds = [1, 2]
        [data]
        source = "g.csv"
        target = "state"
        categorical = "onehot"
        missing = "impute"
        [model]
        hidden = [8]
        [train]
        epochs = 4
        [run]
        keep_weights = "all"
        """,
    )
    store = tmp_path / "s.sqlite"
    assert invoke("run", path, "--store", store, "--workers", 1, "-q").exit_code == 0
    out = tmp_path / "bundle"
    assert invoke("export", path, "--store", store, "--out", out).exit_code == 0
    desc = json.loads((out / "model.json").read_text())
    assert [c["name"] for c in desc["preprocessing"]["encodings"]["columns"]] == ["temp", "humidity", "soil", "vent"]
    preds = tmp_path / "preds.csv"
    predicted = invoke("predict", out, tmp_path / "g.csv", "--out", preds)
    assert predicted.exit_code == 0, predicted.stderr
    test = [r for r in read_preds(preds) if r["split"] == "test"]
    got = accuracy_score([r["state"] for r in test], [r["predicted"] for r in test])
    assert got == desc["metrics"]["test"]["accuracy"]
    assert "(stored: the same)" in next(ln for ln in predicted.stdout.splitlines() if ln.startswith("test,"))


def test_a_stacked_batch_norm_member_exports_its_running_statistics(tmp_path):
    """A batch-norm MLP trained stacked: the bundle holds nn.BatchNorm1d's weight, bias and
    running statistics for the member, so the single network it loads into scores the
    stored accuracies exactly (counted by sklearn.metrics from the predictions file)."""
    path = write_recipe(
        tmp_path,
        """
        name = "bn-export"
        seeds = [3, 4]
        [data]
        source = "wine"
        [model]
        hidden = [17, 9]
        activation = "elu"
        batch_norm = true
        [train]
        optimizer = "adam"
        lr = 3e-3
        batch_size = 13
        epochs = 3
        """,
    )
    store = tmp_path / "s.sqlite"
    ran = invoke("run", path, "--store", store, "--workers", 1)
    assert ran.exit_code == 0 and "stacked group" in ran.stderr and "warning" not in ran.stderr, ran.stderr
    out = tmp_path / "bundle"
    assert invoke("export", path, "--store", store, "--out", out).exit_code == 0
    desc = json.loads((out / "model.json").read_text())
    state = load_file(out / "weights.safetensors")
    assert any(k.endswith("running_mean") for k in state) and any(k.endswith("num_batches_tracked") for k in state)
    preds = tmp_path / "preds.csv"
    assert invoke("predict", out, "wine", "--out", preds).exit_code == 0
    rows = read_preds(preds)
    for split in ("val", "test"):
        part = [r for r in rows if r["split"] == split]
        got = accuracy_score([r["target"] for r in part], [r["predicted"] for r in part])
        assert got == desc["metrics"][split]["accuracy"]
