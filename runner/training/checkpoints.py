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

__all__ = ["load", "remove", "save"]


def save(path: str, state: dict) -> None:
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    tmp = target.with_suffix(f".tmp{os.getpid()}")
    torch.save(state, tmp)
    os.replace(tmp, target)


def load(path: str) -> dict | None:
    try:
        return torch.load(path, weights_only=True)
    except FileNotFoundError:
        return None
    except Exception:  # a damaged checkpoint costs the job its head start, never its result
        return None


def remove(path: str | None) -> None:
    if path:
        with contextlib.suppress(FileNotFoundError):
            os.remove(path)
