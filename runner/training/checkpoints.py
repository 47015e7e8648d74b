"""Mid-job checkpoints: everything needed to continue a job bit for bit.

Saved with torch.save and read back with ``weights_only=True``, which only rebuilds tensors
and plain containers, so a checkpoint file cannot run code. Writes go to a temporary file
and are renamed into place, so a kill mid-write leaves the previous checkpoint intact.
"""

from __future__ import annotations

import contextlib
import os
from pathlib import Path

import torch

__all__ = ["Unfit", "load", "remove", "save"]


class Unfit(Exception):
    """A checkpoint that loads but does not fit the job's model or state."""


def save(path: str, state: dict) -> str | None:
    """Write the checkpoint; None, or why it could not be written (a full disk, a read-only
    folder). A checkpoint is only a head start: failing to save one never fails the job."""
    target = Path(path)
    tmp = target.with_suffix(f".tmp{os.getpid()}")
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        torch.save(state, tmp)
        os.replace(tmp, target)
    except (OSError, RuntimeError) as exc:  # torch reports a failed write as RuntimeError
        remove(str(tmp))
        return str(exc)[:200]
    return None


def load(path: str) -> dict | None:
    try:
        return torch.load(path, weights_only=True)
    except FileNotFoundError:
        return None
    except Exception:  # a damaged checkpoint costs the job its head start, never its result
        return None


def remove(path: str | None) -> None:
    if path:
        with contextlib.suppress(OSError):  # gone, or never written (its folder could not be made)
            os.remove(path)
