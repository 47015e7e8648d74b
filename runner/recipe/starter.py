"""`recipe new`: a commented starter recipe for a data file, with the target and task guessed."""

from __future__ import annotations

import os
import re
from pathlib import Path

from runner.datasets.sources import MAX_CLASSES_AUTO, column_cells, is_image_source
from runner.errors import DataError
from runner.recipe.settings import BUNDLED

__all__ = ["starter_recipe", "target_candidates", "with_rates"]

SAMPLE_BYTES = 16 << 20  # what `recipe new` reads of a data file to guess its target
_LIKELY = ("target", "label", "class", "y", "outcome", "species", "result")


def _read_columns(path: Path) -> dict[str, list[str]]:
    if not path.exists():
        raise DataError("data file not found", where=str(path))
    return column_cells(path, str(path))


def _kind(values: list[str]) -> tuple[str, int]:
    try:
        numbers = [float(v) for v in values]
    except ValueError:
        return "text", len(set(values))
    distinct = len(set(numbers))
    whole = all(n.is_integer() for n in numbers)
    return ("classes" if whole and distinct <= MAX_CLASSES_AUTO else "numeric"), distinct


def target_candidates(path: Path) -> list[tuple[str, str]]:
    """(column, task) pairs, most likely first: class-like columns, named ones first."""
    cols = _read_columns(path)
    found = []
    for name, values in cols.items():
        kind, distinct = _kind(values)
        if kind in ("text", "classes") and 2 <= distinct <= max(MAX_CLASSES_AUTO, 2):
            found.append((name, "classification"))
    found.sort(key=lambda c: (c[0].lower() not in _LIKELY, list(cols).index(c[0]) * -1))
    if not found:
        last = list(cols)[-1]
        if _kind(cols[last])[0] == "numeric":
            found.append((last, "regression"))
    return found


def starter_recipe(source: str, out: Path, target: str | None = None) -> str:
    """The text of a starter recipe for ``source`` (a file, or a bundled name), to live at ``out``."""
    name = re.sub(r"[^A-Za-z0-9_.-]+", "-", Path(source).stem).strip("-.") or "study"
    lines = [
        f"# Starter recipe for {source}, written by 'recipe new'. Edit, then: recipe check {out.name}",
        f'name = "{name}"',
        'description = "What does this study want to find out?"',
        "seeds = [1, 2, 3, 4, 5]                # each configuration runs once per seed",
        "",
    ]
    data = ["[data]"]
    image = False
    task = None
    if source in BUNDLED:
        data.append(f'source = "{source}"')
        image = source == "digits"
    else:
        path = Path(source)
        rel = os.path.relpath(path.resolve(), out.resolve().parent)
        data.append(f'source = "{rel}"                # relative to this recipe')
        if path.is_dir() or path.suffix.lower() == ".npz":
            image = is_image_source(path)
        else:
            candidates = target_candidates(path)
            if target is None:
                if not candidates:
                    raise DataError("no column looks like a target", where=source, hint="Name it with --target COLUMN")
                target, task = candidates[0]
                others = ", ".join(c for c, _ in candidates[1:4])
                note = f"   # guessed ({task})" + (f"; other candidates: {others}" if others else "")
            else:
                cols = _read_columns(path)
                if target not in cols:
                    raise DataError(
                        "no such column",
                        where=source,
                        key="--target",
                        value=target,
                        allowed=", ".join(f'"{c}"' for c in cols),
                    )
                note = ""
            data.append(f'target = "{target}"{note}')
    data += [
        "split = { val = 0.2, test = 0.2, stratify = true }   # the seed draws the split",
        'scale = "standard"                     # fitted on the training split only',
        "",
    ]
    model = ["[model]"]
    if image:
        model += [
            'kind = "cnn"                           # image data: conv layers, then a dense head',
            "channels = [16, 32]",
            "hidden = [64]",
        ]
    else:
        model += ["hidden = [64, 64]"]
    model += ['activation = "relu"', 'init = "he_normal"', "dropout = 0.0", ""]
    train = [
        "[train]",
        'optimizer = "adam"',
        "lr = 1e-3",
        "batch_size = 32",
        "epochs = 30",
        "patience = 0                           # early stopping: epochs without improvement; 0 = off",
        "",
    ]
    factors = [
        "# Every combination of levels is one configuration. A linked factor moves several",
        "# settings together, position by position: here each optimizer gets learning rates",
        "# suited to it (plain SGD at Adam's rate would only show that the rate is too small).",
        "[factors.optimizer]",
        'labels           = ["sgd 0.03", "sgd 0.1", "momentum 0.01", "adam 0.001", "adam 0.003"]',
        '"train.optimizer" = ["sgd", "sgd", "momentum", "adam", "adam"]',
        '"train.lr"        = [0.03, 0.1, 0.01, 0.001, 0.003]',
        "",
        "[factors]",
        '"train.l2" = [0.0, 1e-4]',
        "",
    ]
    return "\n".join(lines + data + model + train + factors)


def with_rates(text: str, rates: dict[str, list[float]]) -> str:
    """The starter's optimizer factor rewritten with these rates per optimizer (a range
    test's suggestions: `recipe new --lr-probe`), in the order the starter lists them."""
    optimizers = [o for o in ("sgd", "momentum", "adam") if rates.get(o)]
    if not optimizers:
        return text
    pairs = [(o, r) for o in optimizers for r in rates[o][:2]]
    block = "\n".join(
        [
            "# Learning rates from a range test of each optimizer (recipe check --lr-probe): where",
            "# its training loss fell fastest, and a step below. A rule of thumb: check the board.",
            "[factors.optimizer]",
            "labels           = [" + ", ".join(f'"{o} {r:g}"' for o, r in pairs) + "]",
            '"train.optimizer" = [' + ", ".join(f'"{o}"' for o, _ in pairs) + "]",
            '"train.lr"        = [' + ", ".join(f"{r:g}" for _, r in pairs) + "]",
        ]
    )
    start = text.index("# Every combination of levels is one configuration.")
    end = text.index("[factors]\n", text.index("[factors.optimizer]"))
    return text[:start] + "# Every combination of levels is one configuration.\n" + block + "\n\n" + text[end:]
