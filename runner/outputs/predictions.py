"""``recipe predict``: a bundle applied to a data file, one output row per input row.

Input: a CSV with a header naming (at least) the bundle's feature columns, in any order; an
NPZ with ``X`` (and optionally ``y``); or a bundled data set's name. When the input holds the
target too, the predictions are scored with the tool's own metric functions. When the input
is the very data the bundle was trained on (same fingerprint), each row is marked with the
split it belonged to for the bundle's seed, and each split is scored apart, its rows in the
split's own order and in one pass, exactly as training scored them: the test rows then
reproduce the stored test metrics. Rows the network trained on score optimistically; the
summary says which those are.
"""

from __future__ import annotations

import csv
import dataclasses
import hashlib
import io
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from runner.components.metrics import evaluate
from runner.datasets.rows import split_rows
from runner.errors import DataError, UserError
from runner.outputs.predict import Predictor

__all__ = ["Scored", "predict_file", "read_rows"]


@dataclass(frozen=True)
class Rows:
    X: np.ndarray  # raw inputs in the bundle's feature order
    y: np.ndarray | None  # class index (-1: a label the bundle does not know) or value; None: no target
    fingerprint: str
    label: str


def _label_of(raw: str) -> str:
    """A target cell as the data stage names classes: whole numbers without a decimal part."""
    try:
        v = float(raw)
    except ValueError:
        return raw.strip()
    return str(int(v)) if v.is_integer() else str(v)


def _csv(raw: bytes, label: str, predictor: Predictor) -> Rows:
    inputs = predictor.bundle.inputs
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError:
        raise DataError("data file is not UTF-8 text", where=label) from None
    numbered = [(n, ln) for n, ln in enumerate(text.splitlines(), 1) if ln.strip() and not ln.lstrip().startswith("#")]
    if len(numbered) < 2:
        raise DataError("CSV needs a header row and at least one data row", where=label)
    rows = list(csv.reader(io.StringIO("\n".join(ln for _, ln in numbered))))
    header = [h.strip() for h in rows[0]]
    missing = [f for f in inputs.features if f not in header]
    if missing:
        raise DataError(
            f"the CSV lacks {len(missing)} of the bundle's feature columns",
            where=label,
            line=numbered[0][0],
            value=missing[0],
            allowed="a header naming every feature: " + ", ".join(inputs.features),
        )
    cols = [header.index(f) for f in inputs.features]
    for r, row in enumerate(rows[1:]):
        if len(row) != len(header):
            line = numbered[r + 1][0]
            raise DataError(f"row has {len(row)} fields, the header has {len(header)}", where=label, line=line)
    if inputs.encodings is not None:  # text and empty cells: encoded as the training split's were
        X = _encoded(rows[1:], header, cols, inputs, label)
    else:
        X = _numeric(rows, header, cols, label, numbered)
    y = None
    if inputs.target and inputs.target in header:
        t = header.index(inputs.target)
        y = _targets([row[t] for row in rows[1:]], predictor)
    return Rows(X, y, hashlib.sha256(raw).hexdigest(), label)


def _encoded(rows: list[list[str]], header: list[str], cols: list[int], inputs, label: str) -> np.ndarray:
    from runner.datasets.encoding import Preprocessing

    cells = {header[i]: [row[i] for row in rows] for i in cols}
    try:
        return Preprocessing.from_json(inputs.encodings).encode(cells)
    except DataError as exc:
        raise exc.located(where=label) from None
    except ValueError as exc:
        raise DataError(f"a numeric column has a value that is not a number ({exc})", where=label) from None


def _numeric(rows: list[list[str]], header: list[str], cols: list[int], label: str, numbered) -> np.ndarray:
    X = np.empty((len(rows) - 1, len(cols)), dtype=np.float32)
    for r, row in enumerate(rows[1:]):
        line = numbered[r + 1][0]
        for c, i in enumerate(cols):
            try:
                X[r, c] = float(row[i])
            except ValueError:
                raise DataError(
                    f'column "{header[i]}" is not numeric',
                    where=label,
                    line=line,
                    value=row[i].strip(),
                    allowed="numbers, as in the data the bundle was trained on",
                ) from None
    return X


def _targets(cells: list, predictor: Predictor) -> np.ndarray:
    inputs = predictor.bundle.inputs
    if inputs.task == "regression":
        return np.array([float(c) for c in cells], dtype=np.float64)
    index = {c: i for i, c in enumerate(inputs.classes)}
    return np.array([index.get(_label_of(str(c)), -1) for c in cells], dtype=np.int64)


def read_rows(data: str, predictor: Predictor) -> Rows:
    """The rows of ``data`` (a CSV or NPZ path, an image folder, or a bundled data set's name)."""
    from runner.recipe.settings import BUNDLED

    path = Path(data)
    if data in BUNDLED and not path.exists():
        ds = _training_dataset(data, predictor)
        if ds is None:
            raise DataError("this bundle was not trained on that data set", value=data, allowed="a CSV or NPZ file")
        return Rows(ds.X, ds.y, ds.fingerprint, data)
    if path.is_dir():
        return _image_folder(path, data, predictor)
    from runner.datasets.files import MAX_DATA_BYTES, read_limited

    raw = read_limited(path, MAX_DATA_BYTES, key=None, shown=data)
    if path.suffix.lower() != ".npz":
        return _csv(raw, data, predictor)
    try:
        with np.load(io.BytesIO(raw), allow_pickle=False) as z:
            X = z["X"]
            y = z.get("y")
    except Exception as exc:  # numpy raises several kinds for a bad archive
        raise DataError(f"not a readable NPZ archive with an array X ({exc})", where=data) from None
    if X.ndim == 3:
        X = X[:, None]
    return Rows(
        X.astype(np.float32), None if y is None else _targets(list(y), predictor), hashlib.sha256(raw).hexdigest(), data
    )


def _image_folder(path: Path, label: str, predictor: Predictor) -> Rows:
    """An image folder laid out as for training (one subfolder per class), read at the
    training's size and colour; labels matched to the bundle's classes by name."""
    from runner.datasets.images import read_image_folder
    from runner.recipe.settings import Settings

    data = Settings.from_dict(predictor.bundle.source["settings"]).data
    X, y, classes, fp = read_image_folder(path, label, data.image_size, data.color)
    known = {c: i for i, c in enumerate(predictor.bundle.inputs.classes)}
    labels = np.array([known.get(c, -1) for c in classes], dtype=np.int64)
    return Rows(X, labels[y], fp, label)


def _training_dataset(data: str, predictor: Predictor):
    """The dataset as training loaded it, when ``data`` is the bundle's own training data."""
    from runner.datasets.sources import load_dataset
    from runner.recipe.settings import Settings

    source = predictor.bundle.source
    settings = Settings.from_dict(source["settings"])
    d = dataclasses.replace(settings.data, source=str(Path(data).resolve()) if Path(data).exists() else data)
    try:
        ds = load_dataset(d, Path.cwd())
    except UserError:
        return None  # not readable as the training data was: not the training data
    return ds if ds.fingerprint == source.get("data_fingerprint") else None


@dataclass(frozen=True)
class Scored:
    rows: int
    split_of: np.ndarray | None  # per input row: "train", "val", "test", or None when unknown
    metrics: dict[str, dict[str, float]]  # split (or "all") -> metric -> value
    counts: dict[str, int]  # rows scored per split
    unknown_labels: int  # rows whose target label the bundle does not know (not scored)


def _score(predictor: Predictor, outputs_of, y: np.ndarray) -> dict[str, float]:
    inputs = predictor.bundle.inputs
    if inputs.task == "classification":
        return evaluate("classification", y, outputs_of, len(inputs.classes))
    return evaluate("regression", y, outputs_of)


def predict_file(predictor: Predictor, data: str, out: Path) -> Scored:
    """Write ``out``: row (1-based data row), split (when known), target (when given),
    predicted, and p_<class> per class; returns what was scored."""
    rows = read_rows(data, predictor)
    inputs = predictor.bundle.inputs
    classify = inputs.task == "classification"
    n = len(rows.X)
    groups: dict[str, np.ndarray] = {"all": np.arange(n)}
    split_of = None
    source = predictor.bundle.source
    # The bytes' hash is the dataset's fingerprint unless reading options (text or empty
    # cells) fold into it; then the file is read again as training read it, to compare.
    if rows.fingerprint == source.get("data_fingerprint") or (inputs.encodings is not None and Path(data).exists()):
        ds = _training_dataset(data, predictor)
        if ds is not None and len(ds.y) == n:
            from runner.recipe.settings import Settings

            groups = split_rows(ds, Settings.from_dict(source["settings"]).data, int(source["seed"]))
            split_of = np.empty(n, dtype=object)
            for name, idx in groups.items():
                split_of[idx] = name
    width = len(inputs.classes) if classify else 1
    answer = np.zeros((n, width), dtype=np.float64)
    metrics, counts, unknown = {}, {}, 0
    for name, idx in groups.items():  # each group in one pass, in its own order
        values = predictor.predict_proba(rows.X[idx]) if classify else predictor.predict(rows.X[idx])[:, None]
        answer[idx] = values
        if rows.y is None:
            continue
        known = rows.y[idx] >= 0 if classify else np.ones(len(idx), bool)
        unknown += int((~known).sum())
        if known.any():
            counts[name] = int(known.sum())
            metrics[name] = _score(predictor, values[known] if classify else values[known, 0], rows.y[idx][known])
    _write(out, rows, split_of, answer, predictor)
    return Scored(rows=n, split_of=split_of, metrics=metrics, counts=counts, unknown_labels=unknown)


def _write(out: Path, rows: Rows, split_of, answer: np.ndarray, predictor: Predictor) -> None:
    inputs = predictor.bundle.inputs
    classify = inputs.task == "classification"
    header = ["row"] + (["split"] if split_of is not None else [])
    if rows.y is not None:
        header.append(inputs.target or "target")
    header.append("predicted")
    if classify:
        header += [f"p_{c}" for c in inputs.classes]
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(f".{out.name}.tmp")
    with tmp.open("w", newline="") as f:
        w = csv.writer(f, lineterminator="\n")
        w.writerow(header)
        for i in range(len(rows.X)):
            cells: list = [i + 1] + ([split_of[i]] if split_of is not None else [])
            if rows.y is not None:
                y = rows.y[i]
                cells.append((inputs.classes[y] if y >= 0 else "?") if classify else repr(float(y)))
            if classify:
                cells.append(inputs.classes[int(answer[i].argmax())])
                cells += [repr(float(p)) for p in answer[i]]
            else:
                cells.append(repr(float(answer[i, 0])))
            w.writerow(cells)
    tmp.replace(out)
