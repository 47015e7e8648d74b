"""A job's random streams: every draw of its training comes from generators built from its
seed, one per purpose, so that adding a draw of one kind never shifts the others."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    import torch

__all__ = ["streams"]


def streams(seed: int) -> tuple[torch.Generator, torch.Generator, torch.Generator]:
    """(initialization, mini-batch order, dropout masks) generators for ``seed``; the split
    uses scikit-learn's random_state = seed."""
    import torch

    init_s, shuffle_s, drop_s = np.random.SeedSequence(seed).generate_state(3)
    return tuple(torch.Generator().manual_seed(int(s)) for s in (init_s, shuffle_s, drop_s))
