"""A bundle put to work: an ordinary ``torch.nn.Module`` and a predict helper.

``load_bundle(DIR)`` rebuilds the network with the tool's own model builder from the
bundle's description and loads its safetensors weights (nothing from the directory is
executed), and wraps it in a ``Predictor`` that applies the bundle's preprocessing:

    from runner.outputs.predict import load_bundle
    predictor = load_bundle("exports/kiln")
    predictor.module                  # the torch.nn.Module (eval mode), scaled inputs in
    predictor.predict(X)              # class labels, or values for regression
    predictor.predict_proba(X)        # (rows, classes) probabilities

``X`` holds raw feature values in the bundle's feature order (``predictor.features``),
shape (rows, features), or (rows, channels, height, width) for images.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from runner.datasets.rows import apply_scaler
from runner.outputs.bundle import Bundle, BundleError, read_bundle

__all__ = ["Predictor", "load_bundle", "load_module"]


def load_module(bundle: Bundle, weights: dict[str, np.ndarray], run_code: bool = False):
    """The bundle's network as an nn.Module in eval mode, with its weights loaded (strict:
    every tensor named and shaped as the network has it). A user's own network is rebuilt
    from the bundle's network.py, which runs that code: only with ``run_code``."""
    import torch

    from runner.training.models import build_model

    if bundle.code is not None:
        if not run_code:
            raise BundleError(
                "this bundle's network is Python code (network.py, from the study's own network file); "
                "loading it runs that code",
                where=str(bundle.path) if bundle.path else None,
                hint="Read network.py, then pass --run-code to recipe predict (run_code=True to load_bundle)",
            )
        from runner.training.user_module import rebuild_network

        m = bundle.model
        assert m.file is not None and m.class_name is not None
        net = rebuild_network(m.file, bundle.code, m.class_name, dict(m.args))
    else:
        g = torch.Generator()  # initial draws are overwritten by the weights; dropout is off in eval mode
        net = build_model(bundle.model, bundle.inputs.input_shape, bundle.n_out, g, g)
    try:
        net.load_state_dict({k: torch.from_numpy(np.array(v)) for k, v in weights.items()}, strict=True)
    except RuntimeError as exc:
        first = str(exc).strip().splitlines()
        raise BundleError(
            "the weights do not fit the described network",
            where=str(bundle.path) if bundle.path else None,
            value=first[1].strip() if len(first) > 1 else first[0],
            hint="Export the bundle again with 'recipe export'",
        ) from None
    net.eval()
    return net


@dataclass
class Predictor:
    """A loaded bundle: ``module`` takes scaled inputs; ``predict``/``predict_proba`` take raw ones."""

    bundle: Bundle
    module: object  # torch.nn.Module

    @property
    def features(self) -> tuple[str, ...]:
        return self.bundle.inputs.features

    @property
    def classes(self) -> tuple[str, ...]:
        return self.bundle.inputs.classes

    def _check(self, X: np.ndarray) -> np.ndarray:
        X = np.asarray(X, dtype=np.float32)
        shape = self.bundle.inputs.input_shape
        if X.ndim == 2 and len(shape) == 3 and X.shape[1] == int(np.prod(shape)):
            X = X.reshape(len(X), *shape)  # flattened images
        if tuple(X.shape[1:]) != shape:
            raise BundleError(
                "input rows do not have the bundle's shape",
                value=list(X.shape[1:]),
                allowed=f"rows of shape {list(shape)} (features: {', '.join(self.features[:8])}"
                + (", ..." if len(self.features) > 8 else "")
                + ")",
            )
        return X

    def outputs(self, X: np.ndarray) -> np.ndarray:
        """The network's raw outputs (logits, or standardized values) for raw rows ``X``."""
        import torch

        inputs = self.bundle.inputs
        scaled = apply_scaler(
            self._check(X), np.array(inputs.subtract, np.float32), np.array(inputs.divide_by, np.float32)
        )
        with torch.no_grad():
            return self.module(torch.from_numpy(scaled)).numpy()

    def predict_proba(self, X: np.ndarray) -> np.ndarray:
        """Class probabilities (rows, classes), softmax in float64 as the tool's metrics take them."""
        import torch

        if self.bundle.inputs.task != "classification":
            raise BundleError("a regression bundle has no class probabilities", key="task", value="regression")
        return torch.softmax(torch.from_numpy(self.outputs(X)).double(), dim=1).numpy()

    def predict(self, X: np.ndarray) -> np.ndarray:
        """Class labels (classification) or values in the target's units (regression)."""
        inputs = self.bundle.inputs
        if inputs.task == "classification":
            return np.array(inputs.classes, dtype=object)[self.predict_proba(X).argmax(axis=1)]
        return self.outputs(X)[:, 0].astype(np.float64) * inputs.target_std + inputs.target_mean


def load_bundle(path: str | Path, run_code: bool = False) -> Predictor:
    """The bundle in directory ``path``, ready to predict (``run_code``: see load_module)."""
    bundle, weights = read_bundle(path)
    return Predictor(bundle, load_module(bundle, weights, run_code))
