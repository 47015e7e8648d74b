"""Image folders: one subfolder per class, each holding PNG or JPEG files (read by Pillow).

Classes are the subfolders' names in sorted order; rows come in sorted order of
"class/file". Each image is read at 8 bits per channel, converted to grayscale (Pillow's
"L": ITU-R 601-2 luma) or RGB, and resized to ``data.image_size`` with Pillow's bilinear
filter (which averages over the source pixels when shrinking); pixel values stay on their
0-255 scale (data.scale normalizes them, fitted on the training split). Without
image_size every image must already have one size. The result is (N, C, H, W) float32, as
an NPZ gives.

The fingerprint covers every file's name and bytes and the size and colour asked for.
Hidden files (".name") are skipped; any other file that is not a PNG or JPEG in a class
folder is an error, so nothing is left out silently.
"""

from __future__ import annotations

import hashlib
import io
import os
import stat
from pathlib import Path

import numpy as np

from runner.datasets.files import MAX_DATA_BYTES, read_limited, show_bytes
from runner.errors import DataError

__all__ = ["IMAGE_SUFFIXES", "MAX_IMAGES", "read_image_folder"]

IMAGE_SUFFIXES = (".jpeg", ".jpg", ".png")
MAX_IMAGES = 1_000_000
_GRAY_MODES = ("1", "L", "LA")


def _pillow():
    try:
        from PIL import Image
    except ImportError:
        raise DataError(
            "reading an image folder needs Pillow, which is not installed",
            key="data.source",
            hint='Install it with: python -m pip install -c constraints.txt -e ".[images]"',
        ) from None
    return Image


def read_image_folder(
    folder: Path, where: str, size: tuple[int, int] | None, color: str
) -> tuple[np.ndarray, np.ndarray, tuple[str, ...], str]:
    """(X of shape (N, C, H, W) float32, y class indices, class names, fingerprint)."""
    Image = _pillow()
    files = _list_files(folder, where)
    digest = hashlib.sha256(f"images|size={size}|color={color}".encode())
    images, labels, total = [], [], 0  # images opened lazily: mode and size, pixels not yet decoded
    classes = tuple(sorted({c for c, _ in files}))
    for cls, name in files:
        shown = f"{where}/{cls}/{name}"
        raw = read_limited(folder / cls / name, MAX_DATA_BYTES, key="data.source", shown=shown)
        total += len(raw)
        if total > MAX_DATA_BYTES:
            raise DataError(
                f"the image files add up to more than the {show_bytes(MAX_DATA_BYTES)} this tool reads",
                key="data.source",
                value=where,
            )
        digest.update(f"{cls}/{name}|{len(raw)}|".encode())
        digest.update(raw)
        images.append(_open(Image, raw, shown))
        labels.append(classes.index(cls))
    if color == "auto":
        color = "grayscale" if all(img.mode in _GRAY_MODES for img in images) else "rgb"
    X = _stack(Image, images, files, where, size, color)
    return X, np.array(labels, dtype=np.int64), classes, digest.hexdigest()


def _list_files(folder: Path, where: str) -> list[tuple[str, str]]:
    """(class, file name) of every image, sorted; refuses anything unexpected."""
    found: list[tuple[str, str]] = []
    for entry in sorted(os.scandir(folder), key=lambda e: e.name):
        if entry.name.startswith("."):
            continue
        if not entry.is_dir():
            if entry.name.lower().endswith(IMAGE_SUFFIXES):
                raise DataError(
                    "images must be in a subfolder named after their class",
                    where=f"{where}/{entry.name}",
                    hint="Move each image into the folder of its class",
                )
            continue  # a README or similar beside the class folders
        count = 0
        for item in sorted(os.scandir(entry.path), key=lambda e: e.name):
            if item.name.startswith("."):
                continue
            mode = item.stat().st_mode
            if not stat.S_ISREG(mode) or not item.name.lower().endswith(IMAGE_SUFFIXES):
                raise DataError(
                    "a class folder may hold only PNG and JPEG files",
                    where=f"{where}/{entry.name}/{item.name}",
                    allowed=", ".join(IMAGE_SUFFIXES),
                    hint="Move or delete it (hidden files are skipped)",
                )
            found.append((entry.name, item.name))
            count += 1
            if len(found) > MAX_IMAGES:
                raise DataError(f"more than {MAX_IMAGES} images", key="data.source", value=where)
        if count == 0:
            raise DataError("a class folder has no images", where=f"{where}/{entry.name}")
    if not found:
        raise DataError(
            "the folder has no class subfolders with images",
            key="data.source",
            value=where,
            allowed="a folder with one subfolder of PNG or JPEG files per class",
        )
    return found


def _open(Image, raw: bytes, shown: str):
    """The image with its mode and size read from its header; pixels decoded later."""
    try:
        img = Image.open(io.BytesIO(raw), formats=("PNG", "JPEG"))
    except Exception:  # Pillow raises many kinds for an unknown or damaged file
        raise DataError("cannot read the image (not a PNG or JPEG that Pillow can decode)", where=shown) from None
    if img.mode in ("I", "F") or img.mode.startswith("I;16"):
        raise DataError(
            f"{img.mode}-mode images (16 or 32 bits per pixel) are not read",
            where=shown,
            allowed="8 bits per channel: grayscale, RGB, RGBA or palette",
            hint="Save the images with 8 bits per channel",
        )
    return img


def _pixels(Image, img, mode: str, width: int, height: int, shown: str) -> np.ndarray:
    try:
        img = img.convert(mode) if img.mode != mode else img  # decodes; an alpha channel is dropped
        if img.size != (width, height):
            img = img.resize((width, height), Image.Resampling.BILINEAR)
        return np.asarray(img, dtype=np.float32)
    except Exception:  # a truncated file, or Pillow's decompression-bomb check
        raise DataError("cannot decode the image (damaged, or too large to decode)", where=shown) from None


def _stack(Image, images: list, files: list, where: str, size, color: str) -> np.ndarray:
    mode, channels = ("L", 1) if color == "grayscale" else ("RGB", 3)
    if size is None:
        sizes = {img.size for img in images}
        if len(sizes) > 1:
            first = images[0].size
            other = next(i for i, img in enumerate(images) if img.size != first)
            raise DataError(
                f"the images have different sizes: {first[1]}x{first[0]} ({'/'.join(files[0])}) and "
                f"{images[other].size[1]}x{images[other].size[0]} ({'/'.join(files[other])})",
                where=where,
                key="data.image_size",
                hint="Set data.image_size = [H, W] to resize every image to one size",
            )
        width, height = images[0].size
    else:
        height, width = size
    need = len(images) * channels * height * width * 4
    if need > 2 * MAX_DATA_BYTES:
        raise DataError(
            f"{len(images)} images of {channels}x{height}x{width} need {show_bytes(need)} in memory",
            key="data.image_size",
            hint="Use a smaller image_size",
        )
    X = np.empty((len(images), channels, height, width), np.float32)
    for i, img in enumerate(images):
        pixels = _pixels(Image, img, mode, width, height, f"{where}/{files[i][0]}/{files[i][1]}")
        X[i] = pixels[None] if channels == 1 else pixels.transpose(2, 0, 1)
        images[i] = None  # each decoded image is dropped once copied
    return X
