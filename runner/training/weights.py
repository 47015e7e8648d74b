"""A trained network's state as bytes and back: the safetensors format (a JSON header and
raw little-endian tensor data), which holds only numbers, so reading it can never run code
(unlike pickle, or torch.load of whole objects)."""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["decode", "encode"]


def encode(state: dict[str, Any]) -> bytes:
    """``state``: name -> numpy array (a state_dict's tensors as numpy)."""
    from safetensors.numpy import save

    return save({name: np.ascontiguousarray(a) for name, a in state.items()})


def decode(blob: bytes) -> dict[str, np.ndarray]:
    from safetensors.numpy import load

    return load(blob)
