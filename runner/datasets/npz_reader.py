"""NPZ archives (numpy.savez): ``X`` of shape (N, F), (N, H, W) or (N, C, H, W) and ``y`` of
shape (N,), checked like a CSV's cells before any job runs.

The archive is read without pickles (``allow_pickle=False``: a pickle can run code), its
members' unpacked sizes are checked against the bound before anything is unpacked (a small
compressed archive can unpack to far more), and X must hold finite real numbers that fit
in float32; y may hold numbers or text labels.
"""

from __future__ import annotations

import io
import zipfile

import numpy as np

from runner.datasets.files import MAX_DATA_BYTES, show_bytes
from runner.errors import DataError

__all__ = ["read_npz"]

_F32_MAX = float(np.finfo(np.float32).max)


def read_npz(raw: bytes, where: str) -> tuple[np.ndarray, np.ndarray]:
    """(X as float32, y as stored) from an NPZ archive's bytes."""
    _check_members(raw, where)
    try:
        with np.load(io.BytesIO(raw), allow_pickle=False) as z:
            if "X" not in z or "y" not in z:
                raise DataError("an NPZ source needs arrays named X and y", where=where, value=sorted(z.keys()))
            X, y = z["X"], z["y"]
    except DataError:
        raise
    except ValueError as exc:
        if "pickle" in str(exc):
            raise DataError(
                "the NPZ holds Python objects (pickled), which are not read",
                where=where,
                allowed="arrays of numbers (X) and numbers or text (y)",
            ) from None
        raise DataError("not a readable NPZ archive", where=where, allowed="a file written by numpy.savez") from None
    except Exception:  # numpy and zipfile raise several kinds for a damaged archive
        raise DataError("not a readable NPZ archive", where=where, allowed="a file written by numpy.savez") from None
    return _check_X(X, len(y) if y.ndim else -1, where, y), y


def _check_members(raw: bytes, where: str) -> None:
    try:
        with zipfile.ZipFile(io.BytesIO(raw)) as z:
            unpacked = sum(info.file_size for info in z.infolist())
    except zipfile.BadZipFile:
        raise DataError("not a readable NPZ archive", where=where, allowed="a file written by numpy.savez") from None
    if unpacked > MAX_DATA_BYTES:
        raise DataError(
            f"the NPZ unpacks to {show_bytes(unpacked)}, more than the {show_bytes(MAX_DATA_BYTES)} this tool reads",
            where=where,
            hint="Use fewer or smaller arrays",
        )


def _check_X(X: np.ndarray, n_y: int, where: str, y: np.ndarray) -> np.ndarray:
    shapes = f"X{tuple(X.shape)}, y{tuple(y.shape)}"
    if X.ndim not in (2, 3, 4) or y.ndim != 1:
        raise DataError(
            "NPZ needs X of shape (N, F), (N, H, W) or (N, C, H, W) and y of shape (N,)", where=where, value=shapes
        )
    if len(X) != n_y:
        raise DataError(f"X has {len(X)} rows but y has {n_y}", where=where, value=shapes)
    kind = X.dtype.kind
    if kind == "c":
        raise DataError("X holds complex numbers", where=where, value=str(X.dtype), allowed="real numbers")
    if kind in "USO" or kind not in "biuf":
        raise DataError("X must hold numbers", where=where, value=str(X.dtype), allowed="integer or float arrays")
    if kind == "f":
        bad = ~np.isfinite(X)
        if bad.any():
            first = np.unravel_index(int(np.argmax(bad)), X.shape)
            raise DataError(
                f"X has {int(bad.sum())} NaN or infinite values, the first at index {tuple(map(int, first))}",
                where=where,
                allowed="finite numbers",
            )
    with np.errstate(over="ignore"):
        X32 = X.astype(np.float32)
    big = ~np.isfinite(X32)
    if big.any():
        first = np.unravel_index(int(np.argmax(big)), X.shape)
        raise DataError(
            f"X has values outside float32's range (largest {_F32_MAX:.4g}), "
            f"the first at index {tuple(map(int, first))}",
            where=where,
            hint="Rescale X (the tool trains in float32)",
        )
    return X32[:, None] if X32.ndim == 3 else X32  # (N, H, W): one channel
