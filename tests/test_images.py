"""images: a folder of class subfolders of PNG/JPEG files reads as (N, C, H, W) float32;
scikit-learn's bundled digits written as PNGs read back exactly and train a CNN to the
accuracy the bundled source gives."""

import json
import math
import sys

import numpy as np
import pytest
import torch
from conftest import invoke, write_recipe
from PIL import Image
from sklearn.datasets import load_digits

from runner.datasets.sources import load_dataset
from runner.recipe.loader import resolve


def settings(**data):
    return resolve({"data": data}, {}).data


def digits_folder(root):
    """Each digit as an 8-bit grayscale PNG, its 0-16 values mapped to 0-255 (rounded), in
    a folder named after its class; returns the pixels written, in the folder's row order."""
    digits = load_digits()
    written = {}
    for i, (image, label) in enumerate(zip(digits.images, digits.target)):
        pixels = np.round(image * 255 / 16).astype(np.uint8)
        folder = root / str(label)
        folder.mkdir(parents=True, exist_ok=True)
        Image.fromarray(pixels, mode="L").save(folder / f"{i:04d}.png")
        written[(str(label), f"{i:04d}.png")] = (pixels, label)
    order = sorted(written)
    return np.stack([written[k][0] for k in order]), np.array([written[k][1] for k in order])


def test_digits_folder_reads_back_exactly(tmp_path):
    pixels, labels = digits_folder(tmp_path / "png")
    ds = load_dataset(settings(source="png"), tmp_path)
    assert ds.X.shape == (1797, 1, 8, 8) and ds.X.dtype == np.float32
    assert np.array_equal(ds.X[:, 0], pixels.astype(np.float32))
    assert ds.classes == tuple(str(d) for d in range(10))
    assert np.array_equal(ds.y, labels) and ds.task == "classification"


def cnn_recipe(tmp_path, name, source):
    return write_recipe(
        tmp_path,
        f"""
        name = "{name}"
        seeds = [1, 2, 3]
        [data]
        source = "{source}"
        split = {{ val = 0.2, test = 0.2 }}
        [model]
        kind = "cnn"
        channels = [8, 16]
        hidden = [32]
        init = "he_uniform"
        [train]
        lr = 2e-3
        epochs = 8
        """,
        name=f"{name}.toml",
    )


def test_cnn_on_the_folder_matches_the_bundled_digits(tmp_path):
    """The same small CNN, seeds and split fractions, through the CLI, on the bundled digits
    and on the PNG folder made from them. The folder's rows come in another order (class by
    class), so each seed draws other splits: the two means over 3 seeds differ as two
    independent sets of splits do. Allowed: 4 standard errors of that difference, the
    per-seed spread taken as the larger of the observed seed-to-seed sd and the binomial
    SE sqrt(p(1-p)/n) of a 360-row test split (with p near 0.97 that is about 0.009; the
    bound comes to about 0.03). Both must also be far above chance (0.1)."""
    digits_folder(tmp_path / "png")
    means, spreads = [], []
    for name, source in (("bundled", "digits"), ("folder", "png")):
        recipe = cnn_recipe(tmp_path, name, source)
        result = invoke("run", recipe, "--workers", "1", "-q", "--format", "json")
        assert result.exit_code == 0, result.output
        row = json.loads(result.stdout)["rows"][0]
        assert row["n"] == 3
        means.append(row["test_mean"])
        spreads.append(float(np.std(list(row["test_per_seed"].values()), ddof=1)))
    p = sum(means) / 2
    per_seed = [max(sd, math.sqrt(p * (1 - p) / 360)) for sd in spreads]
    tolerance = 4 * math.sqrt(sum(s**2 / 3 for s in per_seed))
    assert min(means) > 0.85
    assert abs(means[0] - means[1]) <= tolerance, (means, tolerance)


def rgb_folder(root, sizes, seed=0):
    rng = np.random.default_rng(seed)
    images = []
    for k, (h, w) in enumerate(sizes):
        pixels = rng.integers(0, 256, size=(h, w, 3), dtype=np.uint8)
        (root / f"c{k % 2}").mkdir(parents=True, exist_ok=True)
        Image.fromarray(pixels, mode="RGB").save(root / f"c{k % 2}" / f"{k:02d}.png")
        images.append((f"c{k % 2}/{k:02d}.png", pixels))
    return [p for _, p in sorted(images, key=lambda t: t[0])]


def test_rgb_resize_matches_torch_antialiased_bilinear(tmp_path):
    """Shrinking 10x12 RGB images to 5x6: Pillow's bilinear filter averages over the source
    pixels, as torch's interpolate(mode="bilinear", antialias=True) does (its documented
    aim is to match Pillow); equal within one 8-bit step (Pillow rounds to uint8)."""
    pixels = rgb_folder(tmp_path / "rgb", [(10, 12)] * 6)
    ds = load_dataset(settings(source="rgb", image_size=[5, 6]), tmp_path)
    assert ds.X.shape == (6, 3, 5, 6)
    source = torch.tensor(np.stack(pixels), dtype=torch.float64).permute(0, 3, 1, 2)
    expected = torch.nn.functional.interpolate(source, size=(5, 6), mode="bilinear", antialias=True)
    assert np.abs(ds.X - expected.numpy()).max() <= 1.0


def test_grayscale_is_itu_r_601_luma(tmp_path):
    """color = "grayscale" on RGB files: L = 0.299 R + 0.587 G + 0.114 B (ITU-R 601-2, the
    transform Pillow documents for "L"), within one 8-bit step; auto keeps RGB."""
    pixels = rgb_folder(tmp_path / "rgb", [(4, 4)] * 4)
    gray = load_dataset(settings(source="rgb", color="grayscale"), tmp_path)
    luma = np.stack([p @ np.array([0.299, 0.587, 0.114]) for p in pixels])
    assert gray.X.shape == (4, 1, 4, 4) and np.abs(gray.X[:, 0] - luma).max() <= 1.0
    assert load_dataset(settings(source="rgb"), tmp_path).X.shape == (4, 3, 4, 4)


def test_fingerprint_covers_every_file_name_and_byte(tmp_path):
    rgb_folder(tmp_path / "rgb", [(4, 4)] * 4)
    first = load_dataset(settings(source="rgb"), tmp_path).fingerprint
    path = tmp_path / "rgb" / "c1" / "03.png"
    data = bytearray(path.read_bytes())
    Image.fromarray(np.zeros((4, 4, 3), np.uint8), mode="RGB").save(path)
    changed = load_dataset(settings(source="rgb"), tmp_path).fingerprint
    path.write_bytes(bytes(data))
    assert load_dataset(settings(source="rgb"), tmp_path).fingerprint == first
    path.rename(tmp_path / "rgb" / "c1" / "04.png")
    renamed = load_dataset(settings(source="rgb"), tmp_path).fingerprint
    assert len({first, changed, renamed}) == 3


def image_recipe(tmp_path, extra=""):
    return write_recipe(
        tmp_path,
        f"""
        name = "img"
        [data]
        source = "rgb"
        {extra}
        [model]
        kind = "cnn"
        """,
    )


def check_message(recipe):
    result = invoke("check", recipe, "--no-probe")
    assert result.exit_code == 2 and "Traceback" not in result.output
    return result.stderr


def test_mixed_sizes_need_image_size(tmp_path):
    rgb_folder(tmp_path / "rgb", [(4, 4), (4, 4), (6, 5)] + [(4, 4)] * 17)
    message = check_message(image_recipe(tmp_path))
    assert "the images have different sizes: 4x4 (c0/00.png) and 6x5 (c0/02.png)" in message
    assert "data.image_size = [H, W]" in message
    result = invoke("check", image_recipe(tmp_path, "image_size = [4, 4]"), "--no-probe")
    assert result.exit_code == 0, result.output


def test_other_files_in_a_class_folder_are_refused(tmp_path):
    rgb_folder(tmp_path / "rgb", [(4, 4)] * 4)
    (tmp_path / "rgb" / "c0" / "notes.txt").write_text("x")
    (tmp_path / "rgb" / "c1" / ".hidden").write_text("skipped")
    message = check_message(image_recipe(tmp_path))
    assert "rgb/c0/notes.txt: a class folder may hold only PNG and JPEG files" in message


def test_damaged_image_is_named(tmp_path):
    rgb_folder(tmp_path / "rgb", [(4, 4)] * 4)
    (tmp_path / "rgb" / "c0" / "bad.png").write_bytes(b"\x89PNG not really")
    message = check_message(image_recipe(tmp_path))
    assert "rgb/c0/bad.png: cannot read the image" in message


def test_jpeg_files_are_read(tmp_path):
    """A JPEG (lossy) of a flat grey image reads back within a few steps of its value."""
    for k in range(4):
        (tmp_path / "jpg" / f"c{k % 2}").mkdir(parents=True, exist_ok=True)
        Image.new("L", (8, 8), color=100 + k).save(tmp_path / "jpg" / f"c{k % 2}" / f"{k}.jpg", quality=95)
    ds = load_dataset(settings(source="jpg"), tmp_path)
    assert ds.X.shape == (4, 1, 8, 8)
    assert np.abs(ds.X.mean(axis=(1, 2, 3)) - np.array([100, 102, 101, 103])).max() <= 2


def test_a_folder_named_like_a_bundled_set_is_not_shadowed(tmp_path):
    """A folder "digits" beside the recipe: the bare name is ambiguous and refused;
    "./digits" reads the folder."""
    rgb_folder(tmp_path / "digits", [(4, 4)] * 4)
    recipe = write_recipe(tmp_path, 'name = "x"\n[data]\nsource = "digits"\n[model]\nkind = "cnn"\n')
    assert 'names both a bundled data set and a file or folder beside the recipe, got "digits"' in check_message(recipe)
    assert load_dataset(settings(source="./digits"), tmp_path).X.shape == (4, 3, 4, 4)


def test_image_options_on_other_sources_are_refused(tmp_path):
    recipe = write_recipe(tmp_path, 'name = "x"\n[data]\nsource = "iris"\nimage_size = [8, 8]\n')
    assert "data.image_size: applies to image folders only" in check_message(recipe)


def test_missing_pillow_gives_the_install_hint(tmp_path, monkeypatch):
    rgb_folder(tmp_path / "rgb", [(4, 4)] * 4)
    monkeypatch.setitem(sys.modules, "PIL", None)  # an import of PIL now fails, as without Pillow
    message = check_message(image_recipe(tmp_path))
    assert "needs Pillow, which is not installed" in message and '".[images]"' in message


@pytest.mark.parametrize("size", [[0, 4], [4]])
def test_image_size_is_validated(tmp_path, size):
    rgb_folder(tmp_path / "rgb", [(4, 4)] * 4)
    message = check_message(image_recipe(tmp_path, f"image_size = {size}"))
    assert "data.image_size" in message


def test_recipe_new_for_an_image_folder_writes_a_cnn_that_checks(tmp_path):
    rgb_folder(tmp_path / "rgb", [(6, 6)] * 20)
    out = tmp_path / "rgb.toml"
    result = invoke("new", tmp_path / "rgb", "--out", out)
    assert result.exit_code == 0, result.output
    assert 'kind = "cnn"' in out.read_text()
    assert invoke("check", out, "--no-probe").exit_code == 0


def test_a_folder_trained_bundle_predicts_the_folder(tmp_path):
    """Image folder -> board -> bundle -> predictions on the folder: the rows are marked with
    their splits and the test rows give the stored test accuracy exactly (counted by
    sklearn.metrics from the predictions file)."""
    import csv

    from sklearn.metrics import accuracy_score

    digits_folder(tmp_path / "png")
    recipe = cnn_recipe(tmp_path, "folder", "png")
    text = recipe.read_text().replace("seeds = [1, 2, 3]", "seeds = [1]").replace("epochs = 8", "epochs = 2")
    recipe.write_text(text)
    store = tmp_path / "s.sqlite"
    assert invoke("run", recipe, "--store", store, "--workers", "1", "-q").exit_code == 0
    out = tmp_path / "bundle"
    assert invoke("export", recipe, "--store", store, "--out", out).exit_code == 0
    preds = tmp_path / "p.csv"
    result = invoke("predict", out, tmp_path / "png", "--out", preds)
    assert result.exit_code == 0, result.stderr
    with open(preds, newline="") as f:
        rows = list(csv.DictReader(f))
    assert len(rows) == 1797 and {r["split"] for r in rows} == {"train", "val", "test"}
    test = [r for r in rows if r["split"] == "test"]
    stored = json.loads((out / "model.json").read_text())["metrics"]["test"]["accuracy"]
    assert accuracy_score([r["target"] for r in test], [r["predicted"] for r in test]) == stored
