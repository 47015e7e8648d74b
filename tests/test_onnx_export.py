"""onnx_export: the ONNX copy of a bundle, run by onnxruntime on raw rows, gives the
probabilities recipe predict wrote (torch and onnxruntime agree to float32 rounding)."""

import csv
import json

import numpy as np
import pytest
from conftest import DATA, invoke, write_recipe

pytest.importorskip("onnx")
ort = pytest.importorskip("onnxruntime")

RECIPE = f"""
    name = "onnx"
    seeds = [1]
    [data]
    source = "{DATA / "iris_sample.csv"}"
    target = "species"
    [model]
    hidden = [8]
    dropout = 0.2
    [train]
    epochs = 3
"""


def test_onnx_model_matches_the_bundle_predictions(tmp_path):
    path = write_recipe(tmp_path, RECIPE)
    store = tmp_path / "s.sqlite"
    assert invoke("run", path, "--store", store, "--workers", 1, "-q").exit_code == 0
    out = tmp_path / "b"
    result = invoke("export", path, "--store", store, "--onnx", "--out", out)
    assert result.exit_code == 0, result.stderr
    preds = tmp_path / "p.csv"
    assert invoke("predict", out, DATA / "iris_sample.csv", "--out", preds).exit_code == 0
    desc = json.loads((out / "model.json").read_text())
    features, classes = desc["preprocessing"]["features"], desc["preprocessing"]["classes"]
    with open(DATA / "iris_sample.csv", newline="") as f:
        rows = list(csv.DictReader(line for line in f if not line.startswith("#")))
    X = np.array([[float(r[c]) for c in features] for r in rows], dtype=np.float32)
    session = ort.InferenceSession(str(out / "model.onnx"), providers=["CPUExecutionProvider"])
    (probs,) = session.run(None, {"features": X})
    with open(preds, newline="") as f:
        ours = np.array([[float(r[f"p_{c}"]) for c in classes] for r in csv.DictReader(f)])
    assert probs.shape == ours.shape == (len(rows), len(classes))
    assert np.allclose(probs, ours, atol=1e-6)
