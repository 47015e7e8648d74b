"""The tables of every setting in [data], [model] and [train], assembled from the components.

A recipe key exists if and only if it is in one of these tables; factor paths, defaults,
the validator and the JSON Schema all come from here.
"""
from __future__ import annotations

from runner.components.activations import ACTIVATIONS
from runner.components.initializers import INITIALIZERS
from runner.components.optimizers import HYPERPARAMS, OPTIMIZERS
from runner.recipe.constraints import Boolean, Choice, Either, Integer, IntList, Param, Real, Text
from runner.components import regularizers
from runner.components import lr_schedules as schedules

__all__ = ["SECTIONS", "DATA", "MODEL", "TRAIN", "BUNDLED", "NOT_IDENTITY", "all_paths", "param_at",
           "identity"]

BUNDLED = ("breast_cancer", "circles", "diabetes", "digits", "iris", "moons", "wine")

SPLIT = {
    "val": Param(Real(0, 1, low_open=True, high_open=True), 0.2, "fraction of rows held out for validation"),
    "test": Param(Real(0, 1, high_open=True), 0.2, "fraction of rows held out for the final test"),
    "stratify": Param(Boolean(), True, "keep class shares equal across splits (classification)"),
}

DATA = {
    "source": Param(Text(), doc="CSV or NPZ path relative to the recipe, or a bundled name: "
                    + ", ".join(BUNDLED)),
    "target": Param(Text(), None, "name of the target column (CSV only)"),
    "task": Param(Choice(("auto", "classification", "regression")), "auto",
                  "auto: a text target, or whole numbers with at most 20 distinct values, is classification"),
    "split": Param(None, table=SPLIT, doc="val/test fractions and stratification; the seed draws the split"),
    "scale": Param(Choice(("minmax", "none", "standard")), "standard",
                   "feature scaling, fitted on the training split only"),
    "n_samples": Param(Integer(20, 1_000_000), 1000, "rows generated for moons and circles"),
    "noise": Param(Real(0, None), 0.1, "noise level for moons and circles"),
}

MODEL = {
    "kind": Param(Choice(("cnn", "mlp")), "mlp", "mlp: dense layers; cnn: conv layers then a dense head"),
    "hidden": Param(IntList(low=1, min_len=0), (64, 64), "dense hidden layer widths; [] is a linear model"),
    "activation": Param(Choice(tuple(ACTIVATIONS)), "relu", "hidden-layer activation"),
    "leaky_slope": Param(Real(0, 1, low_open=True, high_open=True), 0.01, "negative slope of leaky_relu"),
    "init": Param(Choice(tuple(INITIALIZERS)), "glorot_uniform", "weight initializer; biases start at 0"),
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
    **schedules.PARAMS,
    "batch_size": Param(Either((Integer(1), Choice(("full",)))), 32,
                        'mini-batch size, or "full" for full-batch gradient descent'),
    "epochs": Param(Integer(1, 100_000), 30, "passes over the training split"),
    "clip_norm": Param(Real(0, None), 0.0, "clip the global gradient norm to this; 0 = off"),
    "patience": Param(Integer(0), 0, "early stopping: epochs without val improvement; 0 = off"),
    "diverge_factor": Param(Real(1, None, low_open=True), 1e6,
                            "stop as diverged when the loss exceeds this multiple of its first value"),
    "time_limit": Param(Real(0, None), 0.0, "seconds one job may train, then it stops as timed out; 0 = no limit"),
    "checkpoint_every": Param(Integer(0), 0, "save a resumable checkpoint every N epochs; 0 = never"),
}

# Settings that change how a job is run but not what it computes: left out of its identity.
NOT_IDENTITY = {"train": ("time_limit", "checkpoint_every")}

SECTIONS = {"data": DATA, "model": MODEL, "train": TRAIN}


def all_paths() -> list[str]:
    """Every dotted path that can be set or used as a factor, e.g. "data.split.val"."""
    out = []

    def walk(table, prefix):
        for key, param in table.items():
            if param.table is not None:
                walk(param.table, f"{prefix}.{key}")
            else:
                out.append(f"{prefix}.{key}")

    for section, table in SECTIONS.items():
        walk(table, section)
    return sorted(out)


def param_at(path: str) -> Param | None:
    parts = path.split(".")
    table = SECTIONS.get(parts[0])
    param = None
    for part in parts[1:]:
        if table is None or part not in table:
            return None
        param = table[part]
        table = param.table
    return param if param is not None and param.table is None else None


def identity(settings: dict) -> dict:
    """The settings a job's key is hashed from (without NOT_IDENTITY)."""
    out = {section: dict(values) for section, values in settings.items()}
    for section, keys in NOT_IDENTITY.items():
        for key in keys:
            out.get(section, {}).pop(key, None)
    return out
