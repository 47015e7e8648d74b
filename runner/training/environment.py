"""What a job records of where it ran: library versions, threads, CPU."""

from __future__ import annotations

import os
import platform
import sys
from typing import Any

__all__ = ["environment"]


def environment() -> dict[str, Any]:
    from importlib import metadata

    import numpy as np
    import torch

    cpu = platform.processor() or platform.machine()
    try:
        with open("/proc/cpuinfo") as f:
            for line in f:
                if line.startswith("model name"):
                    cpu = line.split(":", 1)[1].strip()
                    break
    except OSError:
        pass
    return {
        "python": sys.version.split()[0],
        "torch": str(torch.__version__),  # a str subclass of torch's: unpickling it would import torch
        "numpy": np.__version__,
        "sklearn": metadata.version("scikit-learn"),  # without importing it (as much as torch)
        "threads": torch.get_num_threads(),
        "cpu": cpu,
        "pid": os.getpid(),
    }
