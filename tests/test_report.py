"""report: the HTML file renders in a real headless Chromium with its table and every figure."""

import os
import re
import shutil
import subprocess

import numpy as np
import pytest
from conftest import invoke, write_recipe
from PIL import Image

pytestmark = pytest.mark.slow  # starts processes, sends signals, or starts Dask, MLflow or a browser

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
FLAGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
]

RECIPE = """
    name = "report"
    seeds = [1, 2]
    [data]
    source = "digits"
    [model]
    hidden = [32, 32, 32, 32]
    activation = "relu"
    [train]
    epochs = 3
    l1 = 1e-3
    l1_mode = "proximal"
    [factors]
    "model.init" = ["glorot_uniform", "zeros"]
    "model.activation" = ["relu", "sigmoid"]
"""


def chromium():
    if CHROMIUM is None:
        if os.environ.get("CI"):
            pytest.fail("CI must have Chromium: .ci/run installs Debian's chromium package")
        pytest.skip("Chromium is not installed here (apt-get install chromium)")
    return CHROMIUM


def test_report_renders_table_and_every_figure(tmp_path):
    browser = chromium()
    path = write_recipe(tmp_path, RECIPE)
    store = tmp_path / "s.sqlite"
    assert invoke("run", path, "--store", store, "-q", "--workers", 2).exit_code == 0
    out = tmp_path / "report.html"
    assert invoke("report", path, "--store", store, "--out", out).exit_code == 0
    page = out.read_text()
    assert "http://" not in page and "https://" not in page  # nothing to fetch
    profile = tmp_path / "profile"
    dom = subprocess.run(
        [browser, *FLAGS, f"--user-data-dir={profile}", "--virtual-time-budget=5000", "--dump-dom", out.as_uri()],
        capture_output=True,
        text=True,
        timeout=120,
    ).stdout
    figures = int(re.search(r'data-figures="(\d+)"', dom).group(1))
    drawn = int(re.search(r'data-figures-drawn="(\d+)"', dom).group(1))
    # curves, main effects, gradient norms, sparsity (proximal L1), dead units (ReLU)
    assert figures == drawn == 5
    for name in ("curves", "effects", "gradients", "sparsity", "dead"):
        assert f'id="fig-{name}"' in dom
    assert len(re.findall(r"<tr class=", dom)) == 4  # one leaderboard row per configuration
    shot = tmp_path / "shot.png"
    subprocess.run(
        [
            browser,
            *FLAGS,
            f"--user-data-dir={profile}",
            "--window-size=1200,2400",
            f"--screenshot={shot}",
            out.as_uri(),
        ],
        capture_output=True,
        timeout=120,
    )
    pixels = np.asarray(Image.open(shot).convert("L"), dtype=float)
    assert pixels.std() > 10  # not a blank page
    assert (pixels < 100).mean() > 0.005  # dark text and plot lines are present
