"""Optional ONNX copy of a bundle's network (``recipe export --onnx``; the ``onnx`` extra).

The ONNX graph takes raw feature rows, float32 (rows, *input_shape), and includes the
bundle's scaling, so a runtime needs nothing else: its output ``probabilities`` (rows,
classes) for classification, or ``value`` (rows,) in the target's units for regression.
Written with torch's TorchScript-based exporter, which needs only the ``onnx`` package.
"""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np

from runner.errors import UserError
from runner.outputs.bundle import Bundle

__all__ = ["ONNX_FILE", "write_onnx"]

ONNX_FILE = "model.onnx"
OPSET = 17


def _wrapped(bundle: Bundle, weights: dict[str, np.ndarray]):
    import torch

    from runner.outputs.predict import load_module

    inputs = bundle.inputs
    net = load_module(bundle, weights, run_code=True)  # exported from the study that ran it

    class Raw(torch.nn.Module):
        """Scaling, the network, then probabilities or target units."""

        def __init__(self):
            super().__init__()
            self.net = net
            shape = (1, *inputs.input_shape)
            self.register_buffer("subtract", torch.tensor(inputs.subtract, dtype=torch.float32).reshape(shape))
            self.register_buffer("divide_by", torch.tensor(inputs.divide_by, dtype=torch.float32).reshape(shape))

        def forward(self, x):
            out = self.net((x - self.subtract) / self.divide_by)
            if inputs.task == "classification":
                return torch.softmax(out, dim=1)
            return out[:, 0] * inputs.target_std + inputs.target_mean

    return Raw().eval()


def write_onnx(out: Path, bundle: Bundle, weights: dict[str, np.ndarray]) -> Path:
    try:
        import onnx  # noqa: F401  (torch's exporter needs it)
    except ImportError:
        raise UserError(
            "ONNX export needs the onnx package",
            key="--onnx",
            hint='Install it with: python -m pip install -c constraints.txt -e ".[onnx]"',
        ) from None
    import torch

    model = _wrapped(bundle, weights)
    example = torch.zeros((2, *bundle.inputs.input_shape), dtype=torch.float32)
    name = "probabilities" if bundle.inputs.task == "classification" else "value"
    target = out / ONNX_FILE
    tmp = out / f".{ONNX_FILE}.tmp"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the exporter announces its newer sibling on every call
        torch.onnx.export(
            model,
            (example,),
            str(tmp),
            dynamo=False,
            input_names=["features"],
            output_names=[name],
            dynamic_axes={"features": {0: "rows"}, name: {0: "rows"}},
            opset_version=OPSET,
        )
    tmp.replace(target)
    return target
