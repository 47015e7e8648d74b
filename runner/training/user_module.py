"""The user's own network (``model.kind = "python"``): its class rebuilt from the source text
a job carries, constructed with the recipe's arguments, and fitted out for the training loop.

The contract (README, "Your own network"): the class is a ``torch.nn.Module`` whose
constructor takes the ``[model.args]`` as keyword arguments; ``forward`` takes the float32
input as the data gives it, (batch, features) or (batch, channels, height, width), and
returns (batch, classes) logits, or (batch, 1) for regression.

What the tool does to it, so that every setting means what it means for its own networks:
- construction draws from torch's global generator (as torch's layers do by default); the
  tool seeds it from the job's initialization stream for the constructor's duration and
  restores it afterwards, so the module's own initialization is seeded too;
- every Linear and Conv layer (``models.layers_with_weights``) is then initialized by
  ``model.init`` from the job's init stream, in the order the forward pass first calls them,
  with the gain of ``model.activation`` (the last one called gets gain 1: it is the output
  layer) and its bias set to zero; other layers (normalization, embeddings, recurrent cells, bare parameters) keep
  their own initialization, and ``model.init = "module"`` keeps the module's own for all;
- each ``nn.Dropout`` becomes the tool's Dropout at the same rate, whose masks come from the
  job's dropout stream; torch's global generator is then seeded from the job's seed, so
  random draws inside ``forward`` (functional dropout, noise) are reproducible too.
Penalties, weight decay and sparsity act on the Linear/Conv weights; everything else is
the single backend's ordinary work.
"""

from __future__ import annotations

import sys
import traceback
import types
from collections.abc import Sequence
from typing import Any

import numpy as np
import torch
from torch import nn

from runner.components.activations import gain
from runner.components.initializers import initialize
from runner.components.metrics import Task
from runner.errors import RecipeError
from runner.recipe.constraints import ArgValue
from runner.recipe.module_file import ModuleSource
from runner.training.diagnostics import activation_kind
from runner.training.models import Dropout, layers_with_weights

__all__ = [
    "UserCodeError",
    "activation_names",
    "build_user_model",
    "check_user_modules",
    "load_class",
    "rebuild_network",
    "summarize_exception",
]

PROBE_BATCH = 4  # rows of the probe batch at validation
SHOWN = 6  # networks described one by one by `recipe check` and `recipe run`

_LOADED: dict[str, types.ModuleType] = {}  # sha256 -> the module run from that source, per process


class UserCodeError(RecipeError):
    """The user's network file fails to import, construct, or honour the contract."""


def summarize_exception(exc: BaseException, filename: str) -> str:
    """The user's exception in one line: its last line, and where in their file it arose,
    e.g. "NameError: name 'nn' is not defined (net.py:3)"."""
    if isinstance(exc, SyntaxError) and exc.filename == filename:
        return f"{type(exc).__name__}: {exc.msg} ({filename}:{exc.lineno})"
    lines = [line for line in str(exc).splitlines() if line.strip()]
    text = type(exc).__name__ + (f": {lines[-1].strip()}" if lines else "")
    frames = [f for f in traceback.extract_tb(exc.__traceback__) if f.filename == filename]
    return text + (f" ({filename}:{frames[-1].lineno})" if frames else "")


def _run_source(module: ModuleSource) -> types.ModuleType:
    """The file's code run once per process from its text (never from the path, which a Dask
    worker may not have), as a module of its own registered in sys.modules."""
    if module.sha256 in _LOADED:
        return _LOADED[module.sha256]
    name = f"recipe_user_network_{module.short}"
    mod = types.ModuleType(name)
    mod.__file__ = module.file
    sys.modules[name] = mod  # dataclasses, typing and pickle look classes up there
    try:
        exec(compile(module.source, module.file, "exec"), mod.__dict__)
    except Exception as exc:
        del sys.modules[name]
        raise UserCodeError(
            f"running {module.file} failed: {summarize_exception(exc, module.file)}",
            key="model.file",
            hint="The file may import installed packages, not other files beside it"
            if isinstance(exc, ImportError)
            else None,
        ) from None
    _LOADED[module.sha256] = mod
    return mod


def _module_classes(mod: types.ModuleType) -> list[str]:
    return sorted(
        name
        for name, obj in vars(mod).items()
        if isinstance(obj, type) and issubclass(obj, nn.Module) and obj.__module__ == mod.__name__
    )


def load_class(module: ModuleSource, class_name: str) -> type[nn.Module]:
    """The nn.Module subclass ``class_name`` defined by the file's source."""
    mod = _run_source(module)
    cls = vars(mod).get(class_name)
    if not (isinstance(cls, type) and issubclass(cls, nn.Module)):
        own = _module_classes(mod)
        problem = f"is not an nn.Module subclass in {module.file}" if cls is not None else f"not found in {module.file}"
        raise UserCodeError(
            problem,
            key="model.class_name",
            value=class_name,
            allowed=", ".join(own) or "(the file defines no nn.Module subclass)",
        )
    return cls


def _construct(cls: type[nn.Module], module: ModuleSource, args: Sequence[tuple[str, Any]], seed: int) -> nn.Module:
    kwargs = {name: _as_list(value) for name, value in args}
    with torch.random.fork_rng(devices=[]):  # its own init draws: seeded, and no trace left
        torch.manual_seed(seed)
        try:
            net = cls(**kwargs)
        except Exception as exc:
            shown = ", ".join(f"{k}={v!r}" for k, v in kwargs.items())
            raise UserCodeError(
                f"constructing {cls.__name__}({shown}) failed: {summarize_exception(exc, module.file)}",
                key="model.args",
                hint="[model.args] holds the constructor's keyword arguments",
            ) from None
    if not isinstance(net, nn.Module):
        raise UserCodeError(f"constructing {cls.__name__} gave no nn.Module", key="model.class_name")
    if not any(True for _ in net.parameters()):
        raise UserCodeError(f"{cls.__name__} has no parameters to train", key="model.class_name", value=cls.__name__)
    return net


def rebuild_network(file: str, source: str, class_name: str, args: dict[str, Any]) -> nn.Module:
    """A user's network rebuilt from what a job stores (``Store.job_module``): the class from
    the source text, constructed with the arguments, untrained. A trained model's
    ``state_dict`` loads into it (the tool's dropout and initialization add no parameter or
    buffer). Runs the source's code."""
    import hashlib

    module = ModuleSource(file=file, source=source, sha256=hashlib.sha256(source.encode()).hexdigest())
    cls = load_class(module, class_name)
    frozen = tuple(sorted((k, ArgValue().check(v)) for k, v in args.items()))
    return _construct(cls, module, frozen, 0)


def _as_list(value: Any) -> Any:
    return [_as_list(v) for v in value] if isinstance(value, tuple) else value


def _own_dropout(net: nn.Module, generator: torch.Generator) -> None:
    """Each nn.Dropout (exactly that class) becomes the tool's Dropout at the same rate."""
    for parent in list(net.modules()):
        for name, child in list(parent.named_children()):
            if type(child) is nn.Dropout:
                setattr(parent, name, Dropout(child.p, generator))


def _forward_order(net: nn.Module, in_shape: tuple[int, ...], file: str) -> list[nn.Module]:
    """The Linear/Conv layers in the order a forward pass first calls them (on two rows of
    zeros, in eval mode), then any it never calls in registration order: the output layer is
    the last one called, whatever order the module defines its layers in."""
    called: dict[nn.Module, None] = {}
    layers = layers_with_weights(net)
    hooks = [m.register_forward_hook(lambda m, _i, _o: called.setdefault(m)) for m in layers]
    was_training = net.training
    net.eval()
    try:
        with torch.no_grad(), torch.random.fork_rng(devices=[]):
            net(torch.zeros(2, *in_shape))
    except Exception as exc:
        raise UserCodeError(
            f"{type(net).__name__}'s forward pass on two rows of zeros of shape {(2, *in_shape)} failed: "
            f"{summarize_exception(exc, file)}",
            key="model.class_name",
            allowed=f"a forward taking rows of shape {in_shape} as the data gives them",
        ) from None
    finally:
        for h in hooks:
            h.remove()
        net.train(was_training)
    return list(called) + [m for m in layers if m not in called]


def _derived_seed(seed: int, purpose: int) -> int:
    return int(np.random.SeedSequence([seed, purpose]).generate_state(1)[0])


def build_user_model(
    module: ModuleSource | None,
    model,
    in_shape: tuple[int, ...],
    n_out: int,
    init_gen: torch.Generator,
    dropout_gen: torch.Generator,
) -> nn.Module:
    """The user's network for one job (``model``: its ModelSettings), initialized as the
    module docstring says. ``in_shape`` and ``n_out`` are checked at validation
    (``check_user_modules``), not here."""
    if module is None:
        raise UserCodeError('a job with model.kind = "python" carries no network source', key="model.file")
    cls = load_class(module, model.class_name)
    seed = init_gen.initial_seed()
    net = _construct(cls, module, model.args, _derived_seed(seed, 1))
    _own_dropout(net, dropout_gen)
    weighted = _forward_order(net, in_shape, module.file) if model.init != "module" else []
    for i, layer in enumerate(weighted):
        layer_gain = 1.0 if i == len(weighted) - 1 else gain(model.activation, model.leaky_slope)
        initialize(model.init, layer.weight, layer_gain, model.init_scale, init_gen)
        if layer.bias is not None:
            with torch.no_grad():
                layer.bias.zero_()
    torch.manual_seed(_derived_seed(seed, 2))  # draws inside forward: the job's own
    return net


def activation_names(net: nn.Module) -> list[str]:
    """The tool's names of the activation modules the network holds, sorted."""
    return sorted({kind for m in net.modules() if (kind := activation_kind(m)) is not None})


def _probe(net: nn.Module, x: torch.Tensor, n_out: int, classify: bool, label: str, file: str) -> tuple[int, ...]:
    """Check the contract on a probe batch: the output's shape, and that a gradient reaches
    the parameters. Returns the output shape."""
    want = (len(x), n_out)
    contract = f"(batch, {n_out}) logits for {n_out} classes" if classify else "(batch, 1) for regression"
    for mode in ("eval", "train"):
        net.train(mode == "train")
        try:
            with torch.set_grad_enabled(mode == "train"):
                out = net(x)
        except Exception as exc:
            raise UserCodeError(
                f"{label}'s forward pass on a probe batch of shape {tuple(x.shape)} ({mode} mode) failed: "
                f"{summarize_exception(exc, file)}",
                key="model.class_name",
                allowed=f"a forward taking {tuple(x.shape[1:])} rows as the data gives them",
            ) from None
        if not isinstance(out, torch.Tensor) or not out.is_floating_point() or tuple(out.shape) != want:
            got = f"shape {tuple(out.shape)} {out.dtype}" if isinstance(out, torch.Tensor) else type(out).__name__
            raise UserCodeError(
                f"{label}'s output on a probe batch of shape {tuple(x.shape)} is {got}",
                key="model.class_name",
                allowed=f"a float tensor of shape {want}: {contract}",
            )
    if not out.requires_grad:
        raise UserCodeError(
            f"{label}'s output does not depend on its parameters (no gradient would reach them)",
            key="model.class_name",
            hint="Return the result of the module's layers, without .detach() or torch.no_grad()",
        )
    net.train()
    return want


def _describe(net: nn.Module, model, label: str, shapes: tuple) -> list[str]:
    params = sum(p.numel() for p in net.parameters())
    weighted = layers_with_weights(net)
    how = (
        'its own initialization (model.init = "module")'
        if model.init == "module"
        else f'{len(weighted)} Linear/Conv layers initialized by model.init "{model.init}"'
    )
    lines = [f"  {label}: {params:,} parameters; {how}; probe batch {shapes[0]} -> {shapes[1]}"]
    names = activation_names(net)
    if not names:
        lines.append(
            f"  note: {label} holds no activation modules (nn.ReLU, nn.Tanh, ...): the dead and saturated "
            "unit diagnostics see nothing (functional calls in forward are invisible to them)"
        )
    elif model.init in ("he_normal", "he_uniform", "orthogonal") and names != [model.activation]:
        lines.append(
            f'  caution: {label} uses {", ".join(names)} but model.activation is "{model.activation}": '
            f'"{model.init}" takes its gain from model.activation; set it to match your network'
        )
    return lines


def _line(recipe, key: str | None) -> int | None:
    """The recipe line of a key; for the arguments, their [model.args] table if it has one."""
    if key == "model.args":
        for n, line in enumerate(recipe.text.splitlines(), 1):
            if line.strip().replace(" ", "") == "[model.args]":
                return n
    return recipe.line_of(key)


TOOL_ONLY = ("hidden", "batch_norm", "channels", "kernel_size", "pool")  # the tool's own networks' shape


def _ignored(grid) -> list[str]:
    """A note when the recipe sets the tool's own networks' shape while every configuration
    trains the user's: those settings change nothing (a user may think they do)."""
    if any(c.module is None for c in grid.configs):
        return []
    recipe = grid.recipe
    given = {f"model.{k}" for k in recipe.sections.get("model", {}) if k in TOOL_ONLY}
    given |= {p for f in recipe.factors for p in f.paths if p.split(".", 1)[1] in TOOL_ONLY and p.startswith("model.")}
    if not given:
        return []
    return [f"note: your network ignores {', '.join(sorted(given))} (settings of the tool's own networks)"]


def check_user_modules(grid) -> list[str]:
    """Validate every configuration's own network, running its file's code in this process:
    import, construction with its arguments, the output shape on a probe batch and a
    gradient reaching the parameters. Returns lines for the user (empty: none in this grid);
    raises UserCodeError naming the recipe line."""
    recipe = grid.recipe
    seen: dict[tuple, list[str]] = {}
    files: dict[str, ModuleSource] = {}
    for config in grid.configs:
        model, module = config.settings.model, config.module
        if module is None:
            continue
        files[module.sha256] = module
        ds = grid.datasets[config.data_id]
        key = (module.sha256, model.class_name, model.args, model.init, model.activation, config.data_id)
        if key in seen:
            continue
        label = f"{model.class_name}({', '.join(f'{k}={_as_list(v)!r}' for k, v in model.args)})"
        classify = ds.task is Task.CLASSIFICATION
        n_out = len(ds.classes) if classify else 1
        try:
            with torch.random.fork_rng(devices=[]):
                gens = (torch.Generator().manual_seed(0), torch.Generator().manual_seed(1))
                net = build_user_model(module, model, tuple(ds.X.shape[1:]), n_out, *gens)
                x = torch.from_numpy(np.ascontiguousarray(ds.X[:PROBE_BATCH], dtype=np.float32))
                out_shape = _probe(net, x, n_out, classify, label, module.file)
        except UserCodeError as err:
            where = ", ".join(f"{f.name} = {f.label(i)}" for f, i in zip(recipe.factors, config.levels))
            if where and len(grid.configs) > 1:
                err.hint = (err.hint + "; " if err.hint else "") + f"in the configuration {where}"
            raise err.located(where=recipe.path.name, line=_line(recipe, err.key)) from None
        seen[key] = _describe(net, model, label, (tuple(x.shape), out_shape))
    if not files:
        return []
    lines = _ignored(grid) + [
        f"model.file: this recipe runs the code of {m.file} (sha256 {m.short}) in this process and in "
        "every worker; only files in the recipe's folder are loaded"
        for m in files.values()
    ]
    described = list(seen.values())
    shown = [line for lines_of_one in described[:SHOWN] for line in lines_of_one]
    if len(described) > SHOWN:
        shown.append(f"  ... and {len(described) - SHOWN} more networks (other arguments), each probed the same way")
    return lines + shown
