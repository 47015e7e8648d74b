"""The model bundle: one trained network and everything needed to use it, in a directory.

- ``weights.safetensors``: the network's state_dict (safetensors: a JSON header and raw
  numbers; reading it cannot run code);
- ``model.json``: the network (``model`` settings, input shape, outputs: enough for
  ``models.build_model`` to rebuild it), the preprocessing (feature names in order, the
  scaler fitted on the rows it trained on, class labels, target standardization, image
  shape; for a table with text or empty cells, ``encodings``: the training split's
  ``encoding.Preprocessing`` record, and ``features`` names the raw input columns), where
  it came from (recipe, job, seed, data fingerprint) and
  the metrics this exact network scored;
- ``card.md``: the same for a person, with the leaderboard's evidence and the cautions.

Reading validates ``model.json`` field by field (a bad bundle is a ``BundleError`` naming
the file and key) and never executes anything from the directory.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from runner.errors import UserError
from runner.recipe.constraints import validate_table
from runner.recipe.settings import MODEL, ModelSettings

__all__ = [
    "CARD",
    "DESCRIPTION",
    "FORMAT",
    "FORMAT_VERSION",
    "WEIGHTS",
    "Bundle",
    "BundleError",
    "Inputs",
    "read_bundle",
    "write_bundle",
]

FORMAT = "recipe-bundle"
FORMAT_VERSION = 1
WEIGHTS = "weights.safetensors"
DESCRIPTION = "model.json"
CARD = "card.md"
CODE = "network.py"  # a user's own network (model.kind = "python"): its source, as trained


class BundleError(UserError):
    """A bundle directory that cannot be read as one."""


@dataclass(frozen=True)
class Inputs:
    """How raw input rows become the network's input, and its outputs answers."""

    task: str  # "classification" or "regression"
    features: tuple[str, ...]  # names, in the order the network takes them
    input_shape: tuple[int, ...]  # one row's shape: (features,) or (channels, height, width)
    scale: str  # "standard", "minmax" or "none"
    subtract: tuple[float, ...]  # per flattened feature, fitted on the training rows
    divide_by: tuple[float, ...]
    classes: tuple[str, ...]  # class labels by output index (classification)
    target: str | None  # the target column's name (CSV data)
    target_mean: float = 0.0  # regression: outputs are standardized targets
    target_std: float = 1.0
    encodings: Mapping[str, Any] | None = None  # category codes / imputation, when the data stage has them

    @property
    def image_shape(self) -> tuple[int, ...] | None:
        return self.input_shape if len(self.input_shape) == 3 else None


@dataclass(frozen=True)
class Bundle:
    model: ModelSettings
    n_out: int
    inputs: Inputs
    source: dict[str, Any]  # recipe, job, seed, data fingerprint, how the weights were obtained
    metrics: dict[str, dict[str, float | None]]  # split -> metric -> value of this network
    path: Path | None = field(default=None, compare=False)
    code: str | None = None  # model.kind = "python": the network file's text (runs when loaded)

    def description(self) -> dict[str, Any]:
        return {
            "format": FORMAT,
            "version": FORMAT_VERSION,
            "network": {
                # unset settings (a user network's file and class, for the tool's own) are left out
                "model": {k: v for k, v in self.model.to_dict().items() if v is not None},
                "input_shape": list(self.inputs.input_shape),
                "outputs": self.n_out,
                **({"code": {"file": CODE, "sha256": _sha(self.code)}} if self.code is not None else {}),
            },
            "preprocessing": _plain(self.inputs),
            "source": self.source,
            "metrics": self.metrics,
        }


def _sha(text: str) -> str:
    return hashlib.sha256(text.encode()).hexdigest()


def _plain(obj: Any) -> dict[str, Any]:
    fields = getattr(obj, "__dataclass_fields__")  # noqa: B009  (slots dataclasses have no __dict__)
    return {name: list(v) if isinstance(v, tuple) else v for name in fields for v in [getattr(obj, name)]}


def write_bundle(out: Path, bundle: Bundle, weights: dict[str, np.ndarray], card: str) -> None:
    """Write the bundle's files into ``out`` (created if missing). Each file goes to a
    temporary name first and is renamed into place, the weights last but one and the
    description last: a directory with a description always has its weights."""
    from runner.training.weights import encode

    out.mkdir(parents=True, exist_ok=True)
    blob = encode(weights)
    desc = bundle.description()
    desc["weights_sha256"] = hashlib.sha256(blob).hexdigest()
    files = [(CARD, card.encode()), (WEIGHTS, blob), (DESCRIPTION, _json(desc))]
    if bundle.code is not None:
        files.insert(0, (CODE, bundle.code.encode()))
    for name, data in files:
        tmp = out / f".{name}.tmp"
        tmp.write_bytes(data)
        tmp.replace(out / name)


def _json(doc: dict[str, Any]) -> bytes:
    return (json.dumps(doc, indent=2, allow_nan=False) + "\n").encode()


def _need(doc: Mapping[str, Any], key: str, kind: type | tuple[type, ...], where: str) -> Any:
    value = doc.get(key) if isinstance(doc, Mapping) else None
    if not isinstance(value, kind) or (isinstance(value, bool) and kind is not bool):
        raise BundleError(
            "missing or of the wrong type",
            where=where,
            key=key,
            value=value,
            hint="Export the bundle again with 'recipe export'",
        )
    return value


def read_bundle(path: str | Path) -> tuple[Bundle, dict[str, np.ndarray]]:
    """The bundle in directory ``path`` and its weights (name -> numpy array)."""
    from runner.training.weights import decode

    root = Path(path)
    where = str(root / DESCRIPTION)
    try:
        doc = json.loads((root / DESCRIPTION).read_text(encoding="utf-8"))
        blob = (root / WEIGHTS).read_bytes()
    except FileNotFoundError as exc:
        raise BundleError(
            "not a model bundle: a file is missing",
            where=str(root),
            value=Path(exc.filename).name,
            allowed=f"a directory written by 'recipe export' ({DESCRIPTION}, {WEIGHTS}, {CARD})",
        ) from None
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise BundleError(f"cannot read the bundle ({exc})", where=where) from None
    if not isinstance(doc, dict) or doc.get("format") != FORMAT:
        raise BundleError("not a model bundle description", where=where, key="format", allowed=f'"{FORMAT}"')
    if doc.get("version") != FORMAT_VERSION:
        raise BundleError("unsupported bundle version", where=where, key="version", value=doc.get("version"))
    if hashlib.sha256(blob).hexdigest() != doc.get("weights_sha256"):
        raise BundleError(
            "the weights file does not match the description (changed or damaged)",
            where=str(root / WEIGHTS),
            hint="Export the bundle again with 'recipe export'",
        )
    network = _need(doc, "network", dict, where)
    try:
        model = validate_table(_need(network, "model", dict, where), MODEL, "network.model")
    except UserError as err:
        raise BundleError(err.problem, where=where, key=err.key, value=err.value, allowed=err.allowed) from None
    settings = ModelSettings(**{k: tuple(v) if isinstance(v, list) else v for k, v in model.items()})
    code = _code(root, network, settings, where)
    inputs = _inputs(_need(doc, "preprocessing", dict, where), where)
    bundle = Bundle(
        model=settings,
        n_out=_need(network, "outputs", int, where),
        inputs=inputs,
        source=_need(doc, "source", dict, where),
        metrics=_need(doc, "metrics", dict, where),
        path=root,
        code=code,
    )
    try:
        weights = decode(blob)
    except Exception as exc:  # safetensors raises its own error kinds for a bad header
        raise BundleError(f"cannot read the weights ({exc})", where=str(root / WEIGHTS)) from None
    return bundle, weights


def _code(root: Path, network: dict[str, Any], settings: ModelSettings, where: str) -> str | None:
    """A user network's source beside the description, checked against its hash (not run)."""
    if settings.kind != "python":
        return None
    entry = network.get("code")
    if not isinstance(entry, dict) or entry.get("file") != CODE:
        raise BundleError(f"a python network needs its source ({CODE}) named under code", where=where, key="network")
    try:
        text = (root / CODE).read_bytes().decode("utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise BundleError(f"cannot read the network's source ({exc})", where=str(root / CODE)) from None
    if _sha(text) != entry.get("sha256"):
        raise BundleError(
            "the network's source does not match the description (changed or damaged)",
            where=str(root / CODE),
            hint="Export the bundle again with 'recipe export'",
        )
    return text


def _inputs(raw: dict[str, Any], where: str) -> Inputs:
    def numbers(key: str) -> tuple[float, ...]:
        values = _need(raw, key, list, where)
        if not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in values):
            raise BundleError("must be a list of numbers", where=where, key=f"preprocessing.{key}")
        return tuple(float(v) for v in values)

    shape = tuple(int(v) for v in _need(raw, "input_shape", list, where))
    features = tuple(str(v) for v in _need(raw, "features", list, where))
    subtract, divide_by = numbers("subtract"), numbers("divide_by")
    width = int(np.prod(shape))
    encodings = raw.get("encodings")
    if encodings is not None:  # raw columns in, encoded features (one-hot, indicators) to the network
        from runner.datasets.encoding import Preprocessing

        try:
            pre = Preprocessing.from_json(encodings)
        except (KeyError, TypeError, ValueError) as exc:
            problem = f"not a readable encoding record ({exc})"
            raise BundleError(problem, where=where, key="preprocessing.encodings") from None
        if tuple(c.name for c in pre.columns) != features or len(pre.feature_names) != width:
            raise BundleError(
                "the encoding record does not match features and input_shape", where=where, key="preprocessing"
            )
        features = tuple(pre.feature_names)  # the width checked below is the network's
    if not (len(features) == len(subtract) == len(divide_by) == width):
        raise BundleError(
            "features, subtract and divide_by must each have one entry per input value",
            where=where,
            key="preprocessing",
            value=f"{len(features)}, {len(subtract)}, {len(divide_by)} for input shape {list(shape)}",
        )
    task = _need(raw, "task", str, where)
    if task not in ("classification", "regression"):
        raise BundleError("unknown task", where=where, key="preprocessing.task", value=task)
    target = raw.get("target")
    return Inputs(
        task=task,
        features=tuple(str(v) for v in raw["features"]),
        input_shape=shape,
        scale=_need(raw, "scale", str, where),
        subtract=subtract,
        divide_by=divide_by,
        classes=tuple(str(c) for c in _need(raw, "classes", list, where)),
        target=str(target) if target is not None else None,
        target_mean=float(_need(raw, "target_mean", (int, float), where)),
        target_std=float(_need(raw, "target_std", (int, float), where)),
        encodings=encodings,
    )
