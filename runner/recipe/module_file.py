"""The user's own network (``model.kind = "python"``): which file it comes from, read once.

A recipe names a Python file beside it (``model.file``) and an ``nn.Module`` class in it
(``model.class_name``), with constructor arguments under ``[model.args]``. Here, without
importing torch or running any of the file's code: the rules on those settings, the file's
place (only under the recipe's folder: ``..`` escapes, absolute paths elsewhere and
symlinks that lead out are refused) and its bytes, whose hash is part of every job key, so
editing the network reruns its jobs. The source text travels with each job
(``JobSpec.module``) so that a worker, local or on a Dask cluster, rebuilds the class from
it and never needs the file; the store keeps it with each job (``Store.job_module``) so an
exported model can be rebuilt. Running the code (import, construction, a probe batch) is
runner/training/user_module.py's.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from pathlib import Path

from runner.errors import RecipeError

__all__ = ["ModuleSource", "check_python_settings", "read_module"]

CONTRACT = "a .py file in the recipe's folder or below it"


@dataclass(frozen=True, slots=True)
class ModuleSource:
    """A network's source as one job needs it: plain data, picklable, no torch.

    ``file`` is the path as the recipe gives it (relative to the recipe's folder, for
    messages), ``source`` the file's whole text, ``sha256`` the hash of its bytes."""

    file: str
    source: str
    sha256: str

    @property
    def short(self) -> str:
        return self.sha256[:12]


def check_python_settings(model) -> None:
    """Rules between the model settings of one configuration (``ModelSettings``)."""
    if model.kind != "python":
        if model.init == "module":
            raise RecipeError(
                "keeps a user network's own initialization; the tool's networks need an initializer",
                key="model.init",
                value="module",
                allowed='"module" only with model.kind = "python"',
                hint='Choose an initializer such as "glorot_uniform", or set model.kind = "python"',
            )
        return
    for key in ("file", "class_name"):
        if getattr(model, key) is None:
            raise RecipeError(
                'is required with model.kind = "python"',
                key=f"model.{key}",
                allowed='a .py file, e.g. file = "net.py"' if key == "file" else "a class name in model.file",
            )
    for key in ("dropout", "input_dropout"):
        if getattr(model, key) > 0:
            raise RecipeError(
                "is the tool's own networks' dropout; with model.kind = \"python\" your module's nn.Dropout "
                "layers keep their own rates",
                key=f"model.{key}",
                value=getattr(model, key),
                allowed="0",
                hint="Make the rate a constructor argument and vary it as model.args.<name>",
            )
    if not model.class_name.isidentifier():
        raise RecipeError("is not a Python class name", key="model.class_name", value=model.class_name)


def read_module(file: str, base_dir: Path) -> ModuleSource:
    """The file's text and hash, if it lies in ``base_dir`` (the recipe's folder) or below."""
    root = base_dir.resolve()
    path = (root / file).resolve()  # also follows symlinks: where the bytes really are
    if not path.is_relative_to(root):
        raise RecipeError(
            "is outside the recipe's folder; only files there or below are loaded",
            key="model.file",
            value=file,
            allowed=CONTRACT,
            hint=f"Copy the file into {root} (a symlink that leads out is refused too)",
        )
    if path.suffix != ".py":
        raise RecipeError("must be a Python file", key="model.file", value=file, allowed="a path ending in .py")
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        raise RecipeError("file not found", key="model.file", value=file, allowed=CONTRACT) from None
    except OSError as exc:
        raise RecipeError(f"cannot read the file ({exc.strerror})", key="model.file", value=file) from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError:
        raise RecipeError("is not UTF-8 text", key="model.file", value=file, allowed=CONTRACT) from None
    return ModuleSource(file=file, source=text, sha256=hashlib.sha256(raw).hexdigest())
