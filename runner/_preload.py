"""Imported once by the worker fork server, before any worker forks from it.

Switching torch to deterministic algorithms costs over a second the first time (it imports
several hundred modules); doing it here means every worker, and every replacement for a
worker that died, starts with it already done. The same goes for scikit-learn's splitters
(the data split of every job): imported inside the first job of each worker they took about
0.8 s of that job's time, enough to trip a one-second time limit.
"""
import torch

import runner.schedule  # noqa: F401  (the worker loop and everything it imports)
import runner.stack  # noqa: F401
import sklearn.model_selection  # noqa: F401  (runner.data imports it lazily, for the CLI's start-up)

torch.use_deterministic_algorithms(True)
