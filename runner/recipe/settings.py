"""Every setting of [data], [model] and [train]: its constraint table, assembled from the
components, and the frozen, typed objects a validated recipe becomes.

A recipe key exists if and only if it is in one of these tables; factor paths, defaults,
the validator and the JSON Schema all come from here. Past the recipe loader, settings
travel only as ``Settings`` (``DataSettings``, ``ModelSettings``, ``TrainSettings``), never
as raw dicts; ``Settings.to_dict`` gives the plain form that job keys are hashed from and the
store keeps.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from runner.components import lr_schedules, regularizers
from runner.components.activations import ACTIVATIONS
from runner.components.initializers import INITIALIZERS
from runner.components.optimizers import HYPERPARAMS, OPTIMIZERS
from runner.recipe.constraints import Arguments, Boolean, Choice, Either, Integer, IntList, Param, Real, Text

__all__ = [
    "ADDED_LATER",
    "BUNDLED",
    "DATA",
    "MODEL",
    "NOT_IDENTITY",
    "SECTIONS",
    "TRAIN",
    "DataSettings",
    "ModelSettings",
    "Settings",
    "SplitSettings",
    "TrainSettings",
    "all_paths",
    "param_at",
]

BUNDLED = ("breast_cancer", "circles", "diabetes", "digits", "iris", "moons", "wine")

VALIDATION = ("fixed", "folds", "resample")

SPLIT = {
    "val": Param(Real(0, 1, low_open=True, high_open=True), 0.2,
                 "fraction of rows held out for validation (folds: each fold is 1/folds of the non-test rows)"),
    "test": Param(Real(0, 1, high_open=True), 0.2,
                  "fraction of rows held out for the final test: drawn once, the same rows for every job"),
    "stratify": Param(Boolean(), True, "keep class shares equal across splits (classification)"),
    "validation": Param(Choice(VALIDATION), "resample",
                        "how seeds vary the validation rows: resample (each seed draws its own train/val split), "
                        "fixed (one train/val split; seeds vary initialization, order and dropout), folds (each "
                        "seed is one repetition of stratified k-fold cross-validation)"),
    "folds": Param(Integer(2, 20), 5, "folds: the number of folds k (each seed trains k jobs)"),
    "test_seed": Param(Integer(0, 2**31 - 1), 0,
                       "seed of the one test split (and of the fixed train/val split), recorded with every job"),
}  # fmt: skip

DATA = {
    "source": Param(
        Text(),
        doc="a CSV, Parquet or NPZ file or an image folder, relative to the recipe, or a bundled name: "
        + ", ".join(BUNDLED),
    ),
    "target": Param(Text(), None, "name of the target column (CSV and Parquet)"),
    "task": Param(
        Choice(("auto", "classification", "regression")),
        "auto",
        "auto: a text target, or whole numbers with at most 20 distinct values, is classification",
    ),
    "split": Param(None, table=SPLIT, doc="val/test fractions and stratification; the seed draws the split"),
    "scale": Param(
        Choice(("minmax", "none", "standard")), "standard", "feature scaling, fitted on the training split only"
    ),
    "n_samples": Param(Integer(20, 1_000_000), 1000, "rows generated for moons and circles"),
    "noise": Param(Real(0, None), 0.1, "noise level for moons and circles"),
    "categorical": Param(
        Choice(("error", "onehot")),
        "error",
        "text feature columns: error, or onehot (categories fitted on the training split; unseen ones all zero)",
    ),
    "missing": Param(
        Choice(("error", "impute")),
        "error",
        "empty feature cells: error, or impute (training-split mean or most frequent value, plus an indicator column)",
    ),
    "image_size": Param(
        IntList(low=1, min_len=2, max_len=2),
        None,
        "image folders: resize every image to [H, W]; unset: keep their size (all must agree)",
    ),
    "color": Param(
        Choice(("auto", "grayscale", "rgb")),
        "auto",
        "image folders: channels; auto is grayscale when every image is, else rgb",
    ),
}

MODEL = {
    "kind": Param(
        Choice(("cnn", "mlp", "python")),
        "mlp",
        "mlp: dense layers; cnn: conv layers then a dense head; python: your own torch.nn.Module",
    ),
    "file": Param(Text(), None, "python: the .py file holding your network, in the recipe's folder (runs its code)"),
    "class_name": Param(Text(), None, "python: the nn.Module subclass in model.file to train"),
    "args": Param(Arguments(), (), "python: the class's keyword arguments, e.g. [model.args] width = 64"),
    "hidden": Param(IntList(low=1, min_len=0), (64, 64), "dense hidden layer widths; [] is a linear model"),
    "activation": Param(Choice(tuple(ACTIVATIONS)), "relu", "hidden-layer activation"),
    "leaky_slope": Param(Real(0, 1, low_open=True, high_open=True), 0.01, "negative slope of leaky_relu"),
    "init": Param(
        Choice((*INITIALIZERS, "module")),
        "glorot_uniform",
        'weight initializer; biases start at 0; "module" (python only): keep your module\'s own',
    ),
    "init_scale": Param(Real(0, None, low_open=True), 0.01, "std (normal) or bound (uniform) for those two inits"),
    "dropout": Param(Real(0, 1, high_open=True), 0.0, "inverted-dropout rate after each hidden layer"),
    "input_dropout": Param(Real(0, 1, high_open=True), 0.0, "inverted-dropout rate on the inputs"),
    "batch_norm": Param(Boolean(), False, "batch normalization before each hidden activation"),
    "channels": Param(IntList(low=1, min_len=1, max_len=8), (16, 32), "cnn: channels of each conv layer"),
    "kernel_size": Param(Integer(1, 15), 3, "cnn: square kernel size (odd sizes keep the image size)"),
    "pool": Param(Choice(("avg", "max", "none")), "max", "cnn: 2x2 pooling after each conv layer"),
}

TRAIN = {
    "optimizer": Param(Choice(tuple(OPTIMIZERS)), "adam", "optimization algorithm"),
    **HYPERPARAMS,
    **regularizers.PARAMS,
    **lr_schedules.PARAMS,
    "batch_size": Param(
        Either((Integer(1), Choice(("full",)))), 32, 'mini-batch size, or "full" for full-batch gradient descent'
    ),
    "epochs": Param(Integer(1, 100_000), 30, "passes over the training split"),
    "clip_norm": Param(Real(0, None), 0.0, "clip the global gradient norm to this; 0 = off"),
    "patience": Param(Integer(0), 0, "early stopping: epochs without val improvement; 0 = off"),
    "diverge_factor": Param(
        Real(1, None, low_open=True), 1e6, "stop as diverged when the loss exceeds this multiple of its first value"
    ),
    "time_limit": Param(Real(0, None), 0.0, "seconds one job may train, then it stops as timed out; 0 = no limit"),
    "checkpoint_every": Param(Integer(0), 0, "save a resumable checkpoint every N epochs; 0 = never"),
}

# Settings that change how a job is run but not what it computes: left out of its identity.
NOT_IDENTITY: dict[str, tuple[str, ...]] = {"train": ("time_limit", "checkpoint_every")}

# Settings added after results were stored, left out of a job's identity while at their
# default: the default computes exactly what the tool computed before the setting existed,
# so results stored then keep their keys and are not rerun.

# Settings added after job keys were first handed out: left out of a job's identity while they
# hold their default, so recipes that do not use them keep the keys (and stored results) they
# had. A recipe that sets one gets new keys, as any changed setting does. (A default can stay
# out because it changes nothing: the data ones read text cells and images, the model ones
# a user's network.)
ADDED_LATER = {
    "data": {key: DATA[key].default for key in ("categorical", "missing", "image_size", "color")},
    "model": {"file": None, "class_name": None, "args": ()},
}

SECTIONS = {"data": DATA, "model": MODEL, "train": TRAIN}


def all_paths() -> list[str]:
    """Every dotted path that can be set or used as a factor, e.g. "data.split.val";
    besides these, each constructor argument ``model.args.<name>``."""
    out = []

    def walk(table, prefix):
        for key, param in table.items():
            if param.table is not None:
                walk(param.table, f"{prefix}.{key}")
            elif not isinstance(param.constraint, Arguments):  # its entries are, by their own names
                out.append(f"{prefix}.{key}")

    for section, table in SECTIONS.items():
        walk(table, section)
    return sorted(out)


def param_at(path: str) -> Param | None:
    """The setting at a dotted path, or None. A free-form table (``model.args``) is not a
    setting itself; each of its entries is (``model.args.width``)."""
    parts = path.split(".")
    table: Mapping[str, Param] | None = SECTIONS.get(parts[0])
    param = None
    for i, part in enumerate(parts[1:], 2):
        if table is None and param is not None and isinstance(param.constraint, Arguments) and i == len(parts):
            return param.constraint.entry(part)
        if table is None or part not in table:
            return None
        param = table[part]
        table = param.table
    if param is None or param.table is not None or isinstance(param.constraint, Arguments):
        return None
    return param


@dataclass(frozen=True, slots=True)
class SplitSettings:
    val: float
    test: float
    stratify: bool
    validation: str  # "resample", "fixed" or "folds"
    folds: int
    test_seed: int

    @property
    def fold_count(self) -> int:
        """Jobs per seed: the folds under k-fold validation, else one."""
        return self.folds if self.validation == "folds" else 1


@dataclass(frozen=True, slots=True)
class DataSettings:
    source: str
    target: str | None
    task: str  # "auto", "classification" or "regression"
    split: SplitSettings
    scale: str
    n_samples: int
    noise: float
    categorical: str  # "error" or "onehot"
    missing: str  # "error" or "impute"
    image_size: tuple[int, int] | None
    color: str  # "auto", "grayscale" or "rgb"


@dataclass(frozen=True, slots=True)
class ModelSettings:
    kind: str  # "mlp", "cnn" or "python"
    file: str | None  # python: the network's file, relative to the recipe
    class_name: str | None  # python: its nn.Module class
    args: tuple[tuple[str, Any], ...]  # python: constructor arguments, sorted by name; lists as tuples
    hidden: tuple[int, ...]
    activation: str
    leaky_slope: float
    init: str
    init_scale: float
    dropout: float
    input_dropout: float
    batch_norm: bool
    channels: tuple[int, ...]
    kernel_size: int
    pool: str

    def to_dict(self) -> dict[str, Any]:
        """The plain form; the constructor arguments as a table, {"width": 64}, as the recipe
        writes them."""
        out = dataclasses.asdict(self)
        out["args"] = {name: _plain(value) for name, value in self.args}
        return out


@dataclass(frozen=True, slots=True)
class TrainSettings:
    optimizer: str
    lr: float
    momentum: float
    beta1: float
    beta2: float
    alpha: float
    eps: float
    weight_decay: float
    l2: float
    l1: float
    l1_mode: str
    sparsity_tol: float
    schedule: str
    step_every: int
    step_gamma: float
    warmup_epochs: int
    batch_size: int | str  # a row count, or "full"
    epochs: int
    clip_norm: float
    patience: int
    diverge_factor: float
    time_limit: float
    checkpoint_every: int

    def batch_rows(self, n: int) -> int:
        """Rows per mini-batch for a training split of ``n`` rows ("full": all of them)."""
        return n if self.batch_size == "full" else min(int(self.batch_size), n)

    @property
    def proximal_l1(self) -> float:
        """The L1 strength applied as a soft-threshold step (0 when L1 is a loss term)."""
        return self.l1 if self.l1_mode == "proximal" else 0.0

    @property
    def penalty_l1(self) -> float:
        """The L1 strength added to the loss (0 when L1 is a proximal step)."""
        return self.l1 if self.l1_mode == "penalty" else 0.0


@dataclass(frozen=True, slots=True)
class Settings:
    """One configuration's fully resolved settings."""

    data: DataSettings
    model: ModelSettings
    train: TrainSettings

    @classmethod
    def from_dict(cls, raw: Mapping[str, Mapping[str, Any]]) -> Settings:
        """From the validated tables (``constraints.validate_table`` output)."""
        data = dict(raw["data"])
        data["split"] = SplitSettings(**data["split"])
        if data.get("image_size") is not None:
            data["image_size"] = tuple(data["image_size"])
        model: dict[str, Any] = {k: tuple(v) if isinstance(v, list) else v for k, v in raw["model"].items()}
        return cls(DataSettings(**data), ModelSettings(**model), TrainSettings(**raw["train"]))

    def to_dict(self) -> dict[str, dict[str, Any]]:
        """The plain nested form: what job keys are hashed from and the store keeps. The
        constructor arguments appear as a table, {"width": 64}, as the recipe writes them."""
        return {
            "data": dataclasses.asdict(self.data),
            "model": self.model.to_dict(),
            "train": dataclasses.asdict(self.train),
        }

    def identity(self) -> dict[str, dict[str, Any]]:
        """``to_dict`` without NOT_IDENTITY, and without ADDED_LATER settings at their
        defaults: what a job's key is hashed from."""
        out = self.to_dict()
        for section, keys in NOT_IDENTITY.items():
            for key in keys:
                out[section].pop(key)
        for section, key in self.unused_later():
            out[section].pop(key)
        return out

    def unused_later(self) -> list[tuple[str, str]]:
        """The ADDED_LATER settings that hold their default, as (section, key)."""
        return [
            (section, key)
            for section, defaults in ADDED_LATER.items()
            for key, default in defaults.items()
            if getattr(getattr(self, section), key) == default
        ]

    def flat(self) -> dict[str, Any]:
        """Every setting by dotted path, e.g. {"train.lr": 0.001, "data.split.val": 0.2};
        ADDED_LATER settings only when they are set (boards and MLflow runs of recipes that
        do not use them look as they did)."""
        out: dict[str, Any] = {}

        def walk(node: Mapping[str, Any], prefix: str) -> None:
            for key, value in node.items():
                if isinstance(value, Mapping):
                    walk(value, f"{prefix}{key}.")
                else:
                    out[f"{prefix}{key}"] = value

        walk(self.to_dict(), "")
        for section, key in self.unused_later():
            out.pop(f"{section}.{key}", None)
        return out

    def with_train(self, **changes: Any) -> Settings:
        """A copy with some [train] settings changed (e.g. the estimate's short probes)."""
        return dataclasses.replace(self, train=dataclasses.replace(self.train, **changes))


def _plain(value: Any) -> Any:
    """A constructor argument as TOML wrote it: tuples back to lists."""
    return [_plain(v) for v in value] if isinstance(value, tuple) else value


_TYPED = {"data": DataSettings, "model": ModelSettings, "train": TrainSettings}
for _section, _cls in _TYPED.items():  # a key added to a table needs its field, and back
    assert [f.name for f in dataclasses.fields(_cls)] == list(SECTIONS[_section]), _section
assert [f.name for f in dataclasses.fields(SplitSettings)] == list(SPLIT)
