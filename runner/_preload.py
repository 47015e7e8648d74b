"""Imported once by the worker fork server, before any worker forks from it.

Switching torch to deterministic algorithms costs over a second the first time (it imports
several hundred modules); doing it here means every worker, and every replacement for a
worker that died, starts with it already done.
"""
import torch

import runner.schedule  # noqa: F401  (the worker loop and everything it imports)
import runner.stack  # noqa: F401

torch.use_deterministic_algorithms(True)
