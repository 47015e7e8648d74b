"""Expand a Recipe into its grid: configurations (factor levels) times seeds.

Every configuration is resolved and validated here, with the data loaded, before any job
runs: an impossible combination is a RecipeError, not a failed job.
"""

from __future__ import annotations

import bisect
import contextlib
import dataclasses
import hashlib
import itertools
import json
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from runner.components.lr_schedules import check_schedule
from runner.components.metrics import METRICS, Task, for_task
from runner.components.optimizers import check_optimizer
from runner.datasets.sources import Dataset, load_dataset, same_bytes_other_reading, source_key
from runner.errors import DataError, RecipeError, UserError
from runner.recipe.footprint import check_footprint
from runner.recipe.loader import Recipe, resolve
from runner.recipe.module_file import ModuleSource, check_python_settings, read_module
from runner.recipe.settings import Settings
from runner.training.job import JobSpec

__all__ = ["Config", "Grid", "Job", "canonical", "expand"]

# Bump when a change to training makes old results incomparable. 2: the test rows are drawn
# once per recipe (data.split.test_seed) and the monitored metric is part of a job's identity
# only when early stopping uses it.
KEY_VERSION = 2


def canonical(obj: Any) -> str:
    """Sorted, compact JSON: the text that identities are hashed from. Typed settings
    appear as their plain dict form, tuples as lists."""
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), default=_plain)


def _plain(obj: Any) -> Any:
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return dataclasses.asdict(obj)
    return list(obj)


@dataclass(frozen=True)
class Config:
    index: int
    id: str  # hash of the resolved settings and data, without the seed
    levels: tuple[int, ...]  # level index of each factor
    assignments: Mapping[str, Any]  # path -> value set by the factors
    settings: Settings
    data_id: str
    module: ModuleSource | None = None  # model.kind = "python": the network's file, read once

    @property
    def module_id(self) -> str | None:
        """The hash of the network file's bytes, part of the identity (None: no file)."""
        return self.module.sha256 if self.module is not None else None


@dataclass(frozen=True)
class Job:
    key: str
    config: Config
    seed: int
    monitor: str
    fold: int | None = None  # under k-fold validation: which fold this job validates on

    def spec(
        self, checkpoint: str | None = None, time_limit: float | None = None, keep_weights: bool = False
    ) -> JobSpec:
        return JobSpec(
            key=self.key,
            seed=self.seed,
            settings=self.config.settings,
            monitor=self.monitor,
            data_id=self.config.data_id,
            checkpoint=checkpoint,
            time_limit=time_limit,
            fold=self.fold,
            keep_weights=keep_weights,
            module=self.config.module,
        )


class Grid:
    """Configurations times seeds (times folds under k-fold validation); ``len`` and
    indexing do not build every job.

    ``monitor`` is the metric early stopping watches (the recipe's rank_by); ``rank_by``,
    ``metric`` and ``goal`` are what the leaderboard ranks on, which ``recipe board
    --rank-by`` may change without retraining."""

    def __init__(self, recipe: Recipe, configs: list[Config], datasets: dict[str, Dataset], rank_by: str,
                 task: Task, monitor: str | None = None):  # fmt: skip
        self.recipe = recipe
        self.configs = configs
        self.datasets = datasets
        self.rank_by = rank_by
        self.metric = rank_by.split(".", 1)[1]
        self.goal = METRICS[self.metric].goal
        self.monitor = monitor or self.metric
        self.task = task
        sizes = [len(recipe.seeds) * c.settings.data.split.fold_count for c in configs]
        self._starts = [sum(sizes[:i]) for i in range(len(sizes) + 1)]
        self._jobs: list[Job | None] = [None] * self._starts[-1]  # made on first use: keys are hashed once
        self._identities: dict[int, dict] = {}  # config position -> settings.identity()

    def __len__(self) -> int:
        return self._starts[-1]

    def __getitem__(self, i: int) -> Job:
        if not -len(self) <= i < len(self):
            raise IndexError(i)
        i %= len(self)
        job = self._jobs[i]
        if job is None:
            job = self._jobs[i] = self._make(i)
        return job

    def _make(self, i: int) -> Job:
        c = bisect.bisect_right(self._starts, i) - 1
        config = self.configs[c]
        folds = config.settings.data.split.fold_count
        seed_index, fold = divmod(i - self._starts[c], folds)
        seed = self.recipe.seeds[seed_index]
        fold_or_none = fold if config.settings.data.split.validation == "folds" else None
        if c not in self._identities:
            self._identities[c] = config.settings.identity()
        key = job_key(config, seed, self.monitor, fold_or_none, self._identities[c])
        return Job(key=key, config=config, seed=seed, monitor=self.monitor, fold=fold_or_none)

    def with_rank_by(self, rank_by: str) -> Grid:
        """The same jobs, ranked on another validation metric (no job key changes)."""
        metric = rank_by.split(".", 1)[1]
        if METRICS[metric].task is not self.task:
            raise RecipeError(f"{metric} is not a {self.task} metric", key="--rank-by", value=rank_by,
                              allowed=", ".join(f'"val.{m}"' for m in for_task(self.task)))  # fmt: skip
        return Grid(self.recipe, self.configs, self.datasets, rank_by, self.task, monitor=self.monitor)

    def __iter__(self):
        return (self[i] for i in range(len(self)))

    def labels(self, config: Config) -> dict[str, str]:
        return {f.name: f.label(i) for f, i in zip(self.recipe.factors, config.levels)}


def job_key(config: Config, seed: int, monitor: str, fold: int | None = None, identity: dict | None = None) -> str:
    """The job's identity: its resolved settings, data, seed and fold (k-fold validation),
    the monitored metric when early stopping watches it (otherwise the metric changes
    nothing the job computes), and a user network's source when there is one.
    ``identity``: ``config.settings.identity()`` when the caller has it already."""
    watched = monitor if config.settings.train.patience > 0 else None
    settings = config.settings.identity() if identity is None else identity
    ident = {"v": KEY_VERSION, "settings": settings, "data": config.data_id, "seed": seed, "monitor": watched,
             "fold": fold}  # fmt: skip
    if config.module is not None:  # only then: other recipes keep their keys
        ident["module"] = config.module_id
    return hashlib.sha256(canonical(ident).encode()).hexdigest()[:24]


def _excluded(assign: Mapping[str, Any], rules) -> bool:
    return any(all(assign[p] == v for p, v in rule.items()) for rule in rules)


def expand(recipe: Recipe) -> Grid:
    try:
        return _expand(recipe)
    except UserError as err:
        line = recipe.line_of(err.key) if err.key and err.where is None else None
        raise err.located(where=recipe.path.name, line=line) from None


def _expand(recipe: Recipe) -> Grid:
    factors = recipe.factors
    datasets: dict[str, Dataset] = {}  # fingerprint -> dataset
    by_source: dict[tuple, Dataset] = {}  # how the data is read -> dataset
    modules: dict[str, ModuleSource] = {}
    configs: list[Config] = []
    task = None
    for combo in itertools.product(*(range(len(f.levels)) for f in factors)):
        assign: dict[str, Any] = {}
        for f, i in zip(factors, combo):
            assign.update(zip(f.paths, f.levels[i]))
        if _excluded(assign, recipe.exclude):
            continue
        where = ", ".join(f"{f.name} = {f.label(i)}" for f, i in zip(factors, combo))
        with _in_configuration(where):
            settings = resolve(recipe.sections, assign)
            _check_rules(settings)
            module = _module(settings, recipe, modules)
        ds = _dataset(settings, recipe, by_source, datasets, where)
        if task is None:
            task = ds.task
        elif ds.task != task:
            raise RecipeError("all configurations must share one task (classification or regression)",
                              key="data.source", value=ds.label)  # fmt: skip
        with _in_configuration(where):
            _check_model_fits_data(settings, ds)
        ident = {"settings": settings.identity(), "data": ds.fingerprint}
        if module is not None:
            ident["module"] = module.sha256
        config_id = hashlib.sha256(canonical(ident).encode()).hexdigest()[:12]
        configs.append(Config(index=len(configs), id=config_id, levels=combo, assignments=assign, settings=settings,
                              data_id=ds.fingerprint, module=module))  # fmt: skip
    _check_grid(configs, modules)
    assert task is not None  # configs is not empty
    return Grid(recipe, configs, datasets, _rank_by(recipe, task), task)


@contextlib.contextmanager
def _in_configuration(where: str):
    """A RecipeError raised inside names the configuration it arose in (when factors vary)."""
    try:
        yield
    except RecipeError as err:
        if where:
            err.hint = (err.hint + "; " if err.hint else "") + f"in the configuration {where}"
        raise


def _dataset(settings: Settings, recipe: Recipe, by_source: dict[tuple, Dataset], datasets: dict[str, Dataset],
             where: str) -> Dataset:  # fmt: skip
    """The configuration's data, read once per way of reading it."""
    skey = source_key(settings.data)
    if skey not in by_source:
        try:
            by_source[skey] = load_dataset(settings.data, recipe.base_dir)
        except DataError as err:
            raise err.located(where=err.where or recipe.path.name) from None
    ds = by_source[skey]
    if datasets.get(ds.fingerprint, ds) is not ds:
        # The same bytes read another way (e.g. a factor over data.target): another
        # dataset, so another id, or its jobs would be handed the first one's rows.
        ds = by_source[skey] = same_bytes_other_reading(ds, skey)
    datasets[ds.fingerprint] = ds
    return ds


def _check_model_fits_data(settings: Settings, ds: Dataset) -> None:
    if settings.model.kind == "cnn" and ds.image_shape is None:
        raise RecipeError(
            'model.kind = "cnn" needs image data',
            key="model.kind",
            value="cnn",
            allowed='"digits" or an NPZ file with X of shape (N, H, W) or (N, C, H, W)',
        )
    if settings.model.kind != "python":  # a user's network is sized once it is built
        check_footprint(settings, ds.shape[0], tuple(ds.shape[1:]), max(1, len(ds.classes)))


def _check_grid(configs: list[Config], modules: dict[str, ModuleSource]) -> None:
    """What only the whole grid shows: settings no configuration uses, nothing left to run,
    configurations judged on different rows."""
    unused = [k for k in ("file", "class_name", "args") if any(getattr(c.settings.model, k) for c in configs)]
    if not modules and unused:
        raise RecipeError(
            'is set, but no configuration has model.kind = "python", so it is never used',
            key=f"model.{unused[0]}",
            hint='Add kind = "python" to [model] to train your own network',
        )
    if not configs:
        raise RecipeError(
            "the exclusions remove every configuration: nothing would run",
            key="exclude",
            hint="Loosen or remove an [[exclude]] rule",
        )
    _check_one_protocol(configs)


def _rank_by(recipe: Recipe, task: Task) -> str:
    rank_by = recipe.rank_by or ("val.accuracy" if task is Task.CLASSIFICATION else "val.rmse")
    metric = rank_by.split(".", 1)[1]
    if METRICS[metric][0] != task:
        raise RecipeError(
            f"{metric} is not a {task} metric",
            key="rank_by",
            value=rank_by,
            allowed=", ".join(f'"val.{m}"' for m in for_task(task)),
        )
    return rank_by


PROTOCOL_PATHS = ("data.split.test", "data.split.test_seed", "data.split.stratify", "data.split.validation",
                  "data.split.folds")  # fmt: skip


def _check_one_protocol(configs: list[Config]) -> None:
    """Every configuration must share the test rows and the validation protocol: comparing
    configurations tested on different rows, or judged with different variances, means nothing."""
    flat = [c.settings.flat() for c in configs]
    for path in PROTOCOL_PATHS:
        values = {f[path] for f in flat}
        if len(values) > 1:
            raise RecipeError(
                "must be the same for every configuration (it decides the test rows or the validation protocol)",
                key=f'factors."{path}"',
                value=sorted(values, key=str),
                hint="Set it once under [data.split] and run a second recipe to compare protocols",
            )


def _module(settings: Settings, recipe: Recipe, seen: dict[str, ModuleSource]) -> ModuleSource | None:
    """The configuration's network file (read once per file), or None for the tool's own."""
    model = settings.model
    check_python_settings(model)
    if model.kind != "python":
        return None
    file = model.file
    assert file is not None  # check_python_settings requires it
    if file not in seen:
        seen[file] = read_module(file, recipe.base_dir)
    return seen[file]


def _check_rules(settings: Settings) -> None:
    """Rules that span two settings, checked for every configuration."""
    check_optimizer(settings.train)
    check_schedule(settings.train)
    split = settings.data.split
    if split.val + split.test >= 0.9:
        raise RecipeError(
            "val and test together must leave at least 10% for training",
            key="data.split",
            value={"val": split.val, "test": split.test},
        )
