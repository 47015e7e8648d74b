"""Expand a Recipe into its grid: configurations (factor levels) times seeds.

Every configuration is resolved and validated here, with the data loaded, before any job
runs: an impossible combination is a RecipeError, not a failed job.
"""

from __future__ import annotations

import dataclasses
import hashlib
import itertools
import json
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from runner.components.lr_schedules import check_schedule
from runner.components.metrics import METRICS, for_task
from runner.components.optimizers import check_optimizer
from runner.datasets.sources import Dataset, load_dataset, source_key
from runner.errors import DataError, RecipeError, UserError
from runner.recipe.loader import Recipe, resolve
from runner.recipe.module_file import ModuleSource, check_python_settings, read_module
from runner.recipe.settings import Settings
from runner.training.job import JobSpec

__all__ = ["Config", "Grid", "Job", "canonical", "expand"]

KEY_VERSION = 1  # bump when a change to training makes old results incomparable


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

    def spec(self, checkpoint: str | None = None, time_limit: float | None = None) -> JobSpec:
        return JobSpec(
            key=self.key,
            seed=self.seed,
            settings=self.config.settings,
            monitor=self.monitor,
            data_id=self.config.data_id,
            checkpoint=checkpoint,
            time_limit=time_limit,
            module=self.config.module,
        )


class Grid:
    """Configurations times seeds; ``len`` and indexing do not build every job."""

    def __init__(self, recipe: Recipe, configs: list[Config], datasets: dict[str, Dataset], rank_by: str, task: str):
        self.recipe = recipe
        self.configs = configs
        self.datasets = datasets
        self.rank_by = rank_by
        self.metric = rank_by.split(".", 1)[1]
        self.goal = METRICS[self.metric][1]
        self.task = task

    def __len__(self) -> int:
        return len(self.configs) * len(self.recipe.seeds)

    def __getitem__(self, i: int) -> Job:
        if not -len(self) <= i < len(self):
            raise IndexError(i)
        i %= len(self)
        config = self.configs[i // len(self.recipe.seeds)]
        seed = self.recipe.seeds[i % len(self.recipe.seeds)]
        return Job(key=job_key(config, seed, self.metric), config=config, seed=seed, monitor=self.metric)

    def __iter__(self):
        return (self[i] for i in range(len(self)))

    def labels(self, config: Config) -> dict[str, str]:
        return {f.name: f.label(i) for f, i in zip(self.recipe.factors, config.levels)}


def job_key(config: Config, seed: int, monitor: str) -> str:
    ident = {
        "v": KEY_VERSION,
        "settings": config.settings.identity(),
        "data": config.data_id,
        "seed": seed,
        "monitor": monitor,
    }
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
    datasets: dict[str, Dataset] = {}
    by_source: dict[tuple, Dataset] = {}
    modules: dict[str, ModuleSource] = {}
    configs: list[Config] = []
    task = None
    for combo in itertools.product(*(range(len(f.levels)) for f in factors)):
        assign = {}
        for f, i in zip(factors, combo):
            assign.update(zip(f.paths, f.levels[i]))
        if _excluded(assign, recipe.exclude):
            continue
        where = ", ".join(f"{f.name} = {f.label(i)}" for f, i in zip(factors, combo))
        try:
            settings = resolve(recipe.sections, assign)
            _check_rules(settings)
            module = _module(settings, recipe, modules)
        except RecipeError as err:
            if where:
                err.hint = (err.hint + "; " if err.hint else "") + f"in the configuration {where}"
            raise
        skey = source_key(settings.data)
        if skey not in by_source:
            try:
                by_source[skey] = load_dataset(settings.data, recipe.base_dir)
            except DataError as err:
                raise err.located(where=err.where or recipe.path.name) from None
        ds = by_source[skey]
        datasets[ds.fingerprint] = ds
        if task is None:
            task = ds.task
        elif ds.task != task:
            raise RecipeError(
                "all configurations must share one task (classification or regression)",
                key="data.source",
                value=ds.label,
            )
        if settings.model.kind == "cnn" and ds.image_shape is None:
            raise RecipeError(
                'model.kind = "cnn" needs image data',
                key="model.kind",
                value="cnn",
                allowed='"digits" or an NPZ file with X of shape (N, H, W) or (N, C, H, W)',
            )
        ident = {"settings": settings.identity(), "data": ds.fingerprint}
        if module is not None:
            ident["module"] = module.sha256
        configs.append(
            Config(
                index=len(configs),
                id=hashlib.sha256(canonical(ident).encode()).hexdigest()[:12],
                levels=combo,
                assignments=assign,
                settings=settings,
                data_id=ds.fingerprint,
                module=module,
            )
        )
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
    rank_by = recipe.rank_by or ("val.accuracy" if task == "classification" else "val.rmse")
    metric = rank_by.split(".", 1)[1]
    if METRICS[metric][0] != task:
        raise RecipeError(
            f"{metric} is not a {task} metric",
            key="rank_by",
            value=rank_by,
            allowed=", ".join(f'"val.{m}"' for m in for_task(task)),
        )
    return Grid(recipe, configs, datasets, rank_by, task)


def _module(settings: Settings, recipe: Recipe, seen: dict[str, ModuleSource]) -> ModuleSource | None:
    """The configuration's network file (read once per file), or None for the tool's own."""
    model = settings.model
    check_python_settings(model)
    if model.kind != "python":
        return None
    if model.file not in seen:
        seen[model.file] = read_module(model.file, recipe.base_dir)
    return seen[model.file]


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
