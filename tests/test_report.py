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


@pytest.mark.slow
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
    # intervals, curves, main effects, gradient norms, sparsity (proximal L1), dead units (ReLU)
    assert figures == drawn == 6
    for name in ("intervals", "curves", "effects", "gradients", "sparsity", "dead"):
        assert f'id="fig-{name}"' in dom
    board = re.search(r'<table id="leaderboard">.*?</table>', dom, re.S).group(0)
    assert len(re.findall(r"<tr class=", board)) == 4  # one leaderboard row per configuration
    for section in ("ablation", "settings", "environment", "cautions"):
        assert f'id="{section}"' in dom
    assert "Main effects on val.accuracy" in dom and "Interaction of model.init and model.activation" in dom
    assert "train.l1_mode" in dom and "proximal" in dom  # the resolved settings every configuration shares
    assert "glorot_uniform | zeros" in dom  # what varies, level by level
    assert "sha256" in dom and "torch" in dom  # data and recipe fingerprints, the environment
    shot = tmp_path / "shot.png"
    subprocess.run(
        [
            browser,
            *FLAGS,
            f"--user-data-dir={profile}",
            "--window-size=1200,5200",
            f"--screenshot={shot}",
            out.as_uri(),
        ],
        capture_output=True,
        timeout=120,
    )
    rgb = np.asarray(Image.open(shot).convert("RGB"), dtype=float)
    pixels = rgb.mean(axis=2)
    assert pixels.std() > 10  # not a blank page
    assert (pixels < 100).mean() > 0.005  # dark text and plot lines are present

    def share(hex_color):
        target = np.array([int(hex_color[i : i + 2], 16) for i in (1, 3, 5)], dtype=float)
        return (np.abs(rgb - target).max(axis=2) < 12).mean()

    assert share("#23577a") > 1e-4 and share("#d1782c") > 1e-5  # the tool's own palette is drawn
    assert share("#1f77b4") < 1e-5 and share("#ff7f0e") < 1e-5  # matplotlib's default blue and orange are not
