"""The recipe schema: typed dataclasses with defaults, and a YAML loader with precise errors.

A recipe is a YAML mapping with the sections below (every key optional except ``name``,
``task`` and ``optimizers``)::

    name: quickstart
    task: {builtin: mlp_digits, steps: 200}         # or dataset + model, or user: pkg.mod:fn
    optimizers:
      - {name: tower-adam, kind: tower, base: adam}
      - {name: adam, kind: fixed, base: Adam}
    sweep: {lr: {low: 1.0e-5, high: 1.0, points: 6}, depths: [1], seeds: [0, 1]}
    tolerance: {metric: train_loss, gap: 0.05}      # or {ratio: 1.25, slack: 0.01}
    resources: {workers: 2, threads: 1, log_every: 10}   # executor: dask, address: tcp://host:8786

:func:`load_recipe` parses the file, applies ``--set key=value`` overrides and converts the
result into :class:`Recipe`, raising :class:`RecipeError` with the file, line, key, what
was expected and, for a misspelled key, the closest valid one. Semantic checks that need
the task and optimizer registries live in :mod:`stepsize_tower.runner.checks`.
"""

from __future__ import annotations

import dataclasses
import difflib
import math
import types
import typing
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal, Union

import yaml

from .errors import RecipeError
from .tolerance import DEFAULT_GAP, DEFAULT_RATIO, DEFAULT_SLACK, GoodRule

__all__ = [
    "ExecutorName",
    "LoadedRecipe",
    "LogRange",
    "OptimizerConfig",
    "Recipe",
    "ResourcesConfig",
    "ScheduleConfig",
    "SweepConfig",
    "TaskConfig",
    "ToleranceConfig",
    "apply_override",
    "load_recipe",
    "parse_recipe",
    "recipe_to_dict",
]


@dataclass
class TaskConfig:
    """What to train. Exactly one of ``builtin``, ``dataset`` (with ``model``) or ``user``.

    Attributes:
        builtin: a built-in task name (``stepsize-tower list``); its batch size is its own.
        dataset: a built-in dataset name, trained with ``model``.
        model: ``linear``, ``mlp`` or ``cnn`` (with ``dataset``).
        user: ``package.module:function`` returning a model and data (see ``user_task``).
        options: keyword arguments for the user function.
        batch_size: minibatch size (``dataset`` and ``user`` tasks).
        hidden: hidden widths of the ``mlp`` model.
        loss: ``auto``, ``cross_entropy`` or ``mse`` (``dataset`` and ``user`` tasks).
        test_fraction: held-out share of the rows (split by the trial's seed).
        steps: optimizer steps per trial (default: the task's own budget).
        epochs: passes over the training set instead of ``steps``.
        metrics: evaluation metrics besides ``train_loss`` and ``test_loss`` (such as
            ``test_accuracy``) reported at the end of every trial.
        eval_every: evaluate the whole-set losses every this many steps (0: at the end only).
    """

    builtin: str | None = None
    dataset: str | None = None
    model: str | None = None
    user: str | None = None
    options: dict[str, Any] = field(default_factory=dict)
    batch_size: int = 64
    hidden: list[int] = field(default_factory=lambda: [128, 64])
    loss: Literal["auto", "cross_entropy", "mse"] = "auto"
    test_fraction: float = 0.2
    steps: int | None = None
    epochs: float | None = None
    metrics: list[str] = field(default_factory=list)
    eval_every: int = 0


@dataclass
class ScheduleConfig:
    """A ``torch.optim.lr_scheduler`` schedule applied to ``group["lr"]`` every step.

    Attributes:
        kind: ``cosine`` (to ``final_factor × lr`` at the last step), ``linear`` (likewise,
            in a straight line), ``step`` (× ``gamma`` every ``step_size`` steps) or
            ``exponential`` (× ``gamma`` every step).
        final_factor: end value relative to the initial lr (``cosine``, ``linear``).
        step_size: steps between decays (``step``).
        gamma: decay factor (``step``, ``exponential``).
        warmup_steps: linear warm-up from ``lr / warmup_steps`` before the schedule (0: none).
    """

    kind: Literal["cosine", "linear", "step", "exponential"] = "cosine"
    final_factor: float = 0.0
    step_size: int = 100
    gamma: float = 0.5
    warmup_steps: int = 0


@dataclass
class OptimizerConfig:
    """One optimizer configuration under test.

    Attributes:
        name: a label for reports (default: ``tower-<base>`` or ``<base>``).
        kind: ``tower`` (a stepsize_tower optimizer) or ``fixed`` (a ``torch.optim`` class).
        base: for ``tower``, ``sgd``, ``adam`` or ``adamw``; for ``fixed``, a ``torch.optim``
            class name such as ``SGD``, ``Adam``, ``AdamW``, ``RMSprop``.
        depths: tower depths for this configuration (default: ``sweep.depths``).
        options: further constructor arguments (``momentum``, ``betas``, ``weight_decay``, …).
        schedule: an optional learning-rate schedule.
    """

    name: str | None = None
    kind: Literal["tower", "fixed"] = "tower"
    base: str = "adam"
    depths: list[int] | None = None
    options: dict[str, Any] = field(default_factory=dict)
    schedule: ScheduleConfig | None = None

    @property
    def label(self) -> str:
        """The configuration's name in reports."""
        if self.name:
            return self.name
        return f"tower-{self.base}" if self.kind == "tower" else self.base


@dataclass
class LogRange:
    """``points`` step sizes evenly spaced in log scale from ``low`` to ``high`` (inclusive)."""

    low: float
    high: float
    points: int

    def values(self) -> list[float]:
        """The step sizes, smallest first."""
        if self.points == 1:
            return [self.low]
        lo, hi = math.log10(self.low), math.log10(self.high)
        return [float(f"{10 ** (lo + (hi - lo) * i / (self.points - 1)):.6g}") for i in range(self.points)]


@dataclass
class SweepConfig:
    """The grid: every configuration × depth × initial step size × seed × option value.

    Attributes:
        lr: initial step sizes, a list or a log range ``{low, high, points}``.
        depths: tower depths (fixed-rate configurations ignore it).
        seeds: seeds of the data split, initial weights and minibatch order.
        options: any other optimizer argument to sweep, ``{name: [values]}``, applied to
            every configuration.
    """

    lr: list[float] | LogRange = field(default_factory=lambda: LogRange(1e-5, 1.0, 6))
    depths: list[int] = field(default_factory=lambda: [1])
    seeds: list[int] = field(default_factory=lambda: [0])
    options: dict[str, list[Any]] = field(default_factory=dict)

    def lrs(self) -> list[float]:
        """The initial step sizes as a list."""
        return self.lr.values() if isinstance(self.lr, LogRange) else list(self.lr)


@dataclass
class ToleranceConfig:
    """When a final ``metric`` counts as good; give the keys of one rule (see :mod:`.tolerance`).

    - ``gap`` (the default, 0.05): good when ``L ≤ L_best + gap × (L_init − L_best)``;
    - ``ratio`` and/or ``slack`` (defaults 1.25 and 0.01): good when
      ``L ≤ max(ratio × L_best, L_best + slack)``.

    ``L_best`` is the best fixed-rate final ``metric`` of the same seed (and option values);
    ``L_init`` is that seed's ``metric`` before the first step. Giving ``gap`` together with
    ``ratio`` or ``slack`` is an error.
    """

    metric: Literal["train_loss", "test_loss"] = "train_loss"
    gap: float | None = None
    ratio: float | None = None
    slack: float | None = None

    def rule(self) -> GoodRule:
        """The rule these keys select, defaults filled in (the ratio band when ``ratio`` or ``slack`` is given)."""
        if self.gap is None and (self.ratio is not None or self.slack is not None):
            return GoodRule(
                "ratio",
                ratio=DEFAULT_RATIO if self.ratio is None else self.ratio,
                slack=DEFAULT_SLACK if self.slack is None else self.slack,
            )
        return GoodRule("gap", gap=DEFAULT_GAP if self.gap is None else self.gap)

    def resolved(self) -> ToleranceConfig:
        """The same rule with its numbers written out (the other rule's keys left null)."""
        rule = self.rule()
        if rule.kind == "ratio":
            return ToleranceConfig(self.metric, ratio=rule.ratio, slack=rule.slack)
        return ToleranceConfig(self.metric, gap=rule.gap)


#: The executors a recipe can name in ``resources.executor`` (see :mod:`stepsize_tower.runner.executors`).
ExecutorName = Literal["local", "dask"]


@dataclass
class ResourcesConfig:
    """How to run the trials.

    Attributes:
        workers: ``local``: worker processes (default: one per core); ``dask``: the most
            trials in flight at once (default: no limit, the scheduler spreads them).
        threads: torch threads per trial.
        log_every: steps between logged step sizes and minibatch losses.
        executor: ``local`` (spawned processes on this machine) or ``dask`` (tasks on a
            running Dask distributed cluster, at ``address``).
        address: the Dask scheduler, such as ``tcp://10.0.0.5:8786`` (``dask`` only).
    """

    workers: int | None = None
    threads: int = 1
    log_every: int = 10
    executor: ExecutorName = "local"
    address: str | None = None


@dataclass
class Recipe:
    """A whole recipe (see the module docstring)."""

    name: str
    task: TaskConfig
    optimizers: list[OptimizerConfig]
    description: str = ""
    sweep: SweepConfig = field(default_factory=SweepConfig)
    tolerance: ToleranceConfig = field(default_factory=ToleranceConfig)
    resources: ResourcesConfig = field(default_factory=ResourcesConfig)


# ---------------------------------------------------------------------------- conversion

Path_ = tuple[str | int, ...]


def _fmt_path(path: Path_) -> str:
    out = ""
    for p in path:
        out += f"[{p}]" if isinstance(p, int) else (f".{p}" if out else p)
    return out


def _describe(tp: Any) -> str:
    origin = typing.get_origin(tp)
    args = typing.get_args(tp)
    if tp is Any:
        return "any value"
    if tp is type(None):
        return "null"
    if tp is bool:
        return "true or false"
    if tp is int:
        return "an integer"
    if tp is float:
        return "a number"
    if tp is str:
        return "a string"
    if origin is Literal:
        return "one of " + ", ".join(repr(a) for a in args)
    if origin is list:
        return f"a list of {_describe(args[0]).removeprefix('a ').removeprefix('an ')}s"
    if origin is dict:
        return "a mapping"
    if origin in (Union, types.UnionType):
        return " or ".join(_describe(a) for a in args)
    if dataclasses.is_dataclass(tp):
        names = [f.name for f in dataclasses.fields(tp)]
        return "a mapping with keys " + ", ".join(names)
    return str(tp)


def _show(value: Any) -> str:
    kind = {bool: "boolean", int: "integer", float: "number", str: "string", list: "list", dict: "mapping"}.get(
        type(value), type(value).__name__
    )
    text = repr(value)
    if len(text) > 60:
        text = text[:57] + "..."
    return f"{text} ({kind})" if value is not None else "null"


class _Converter:
    """Turns parsed YAML into dataclasses, raising :class:`RecipeError` with file and line."""

    def __init__(self, source: str, lines: dict[Path_, int]) -> None:
        self.source = source
        self.lines = lines

    def error(self, path: Path_, message: str) -> RecipeError:
        line = None
        for k in range(len(path), -1, -1):
            if path[:k] in self.lines:
                line = self.lines[path[:k]]
                break
        return RecipeError(message, source=self.source, line=line, key=_fmt_path(path))

    def convert(self, value: Any, tp: Any, path: Path_) -> Any:
        origin = typing.get_origin(tp)
        args = typing.get_args(tp)
        if tp is Any:
            return value
        if origin in (Union, types.UnionType):
            if value is None and type(None) in args:
                return None
            candidates = [a for a in args if a is not type(None)]
            if len(candidates) == 1:
                return self.convert(value, candidates[0], path)
            for cand in candidates:  # pick by shape first: a mapping goes to a dataclass, a list to a list
                if isinstance(value, dict) and dataclasses.is_dataclass(cand):
                    return self.convert(value, cand, path)
                if isinstance(value, list) and typing.get_origin(cand) is list:
                    return self.convert(value, cand, path)
            raise self.error(path, f"expected {_describe(tp)}, got {_show(value)}")
        if dataclasses.is_dataclass(tp):
            return self.dataclass(value, tp, path)
        if origin is list:
            if not isinstance(value, list):
                raise self.error(path, f"expected {_describe(tp)}, got {_show(value)}")
            return [self.convert(v, args[0], (*path, i)) for i, v in enumerate(value)]
        if origin is dict:
            if not isinstance(value, dict):
                raise self.error(path, f"expected {_describe(tp)}, got {_show(value)}")
            return {str(k): self.convert(v, args[1], (*path, str(k))) for k, v in value.items()}
        if origin is Literal:
            if value not in args:
                close = difflib.get_close_matches(str(value), [str(a) for a in args], n=1)
                hint = f" (did you mean {close[0]!r}?)" if close else ""
                raise self.error(path, f"expected {_describe(tp)}, got {_show(value)}{hint}")
            return value
        if tp is bool:
            if not isinstance(value, bool):
                raise self.error(path, f"expected true or false, got {_show(value)}")
            return value
        if tp is int:
            if isinstance(value, bool) or not isinstance(value, int):
                raise self.error(path, f"expected an integer, got {_show(value)}")
            return value
        if tp is float:
            if isinstance(value, str):  # YAML 1.1 reads 1e-5 (no dot) as a string
                try:
                    value = float(value)
                except ValueError:
                    raise self.error(path, f"expected a number, got {_show(value)}") from None
            if isinstance(value, bool) or not isinstance(value, int | float):
                raise self.error(path, f"expected a number, got {_show(value)}")
            if not math.isfinite(value):
                raise self.error(path, f"expected a finite number, got {value}")
            return float(value)
        if tp is str:
            if not isinstance(value, str):
                raise self.error(path, f"expected a string, got {_show(value)}")
            return value
        raise TypeError(f"unsupported schema type {tp!r}")  # a bug in the schema, not in the recipe

    def dataclass(self, value: Any, tp: Any, path: Path_) -> Any:
        if not isinstance(value, dict):
            raise self.error(path, f"expected {_describe(tp)}, got {_show(value)}")
        hints = typing.get_type_hints(tp)
        fields = {f.name: f for f in dataclasses.fields(tp)}
        for key in value:
            if key not in fields:
                close = difflib.get_close_matches(str(key), list(fields), n=1, cutoff=0.6)
                hint = f"; did you mean {close[0]!r}?" if close else f"; valid keys: {', '.join(fields)}"
                raise self.error((*path, str(key)), f"unknown key {key!r}{hint}")
        kwargs = {}
        for name, f in fields.items():
            if name in value:
                kwargs[name] = self.convert(value[name], hints[name], (*path, name))
            elif f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING:
                raise self.error(path, f"missing required key {name!r} ({_describe(hints[name])})")
        return tp(**kwargs)


# ---------------------------------------------------------------------------- YAML with lines


@dataclass
class LoadedRecipe:
    """A converted recipe with where it came from, for later checks that name a line.

    Attributes:
        recipe: the typed recipe.
        source: the file name shown in errors.
        lines: 1-based line of every key path present in the file.
        folder: the recipe's folder (searched first for user task modules), if a file.
    """

    recipe: Recipe
    source: str
    lines: dict[Path_, int]
    folder: str | None = None

    def error(self, path: Path_, message: str) -> RecipeError:
        """A :class:`RecipeError` at ``path`` (a tuple of keys and indices) of this recipe."""
        return _Converter(self.source, self.lines).error(path, message)


class _UniqueKeyLoader(yaml.SafeLoader):
    """A safe loader that rejects duplicate keys (PyYAML silently keeps the last one)."""


def _construct_mapping(loader: yaml.SafeLoader, node: yaml.MappingNode, deep: bool = False) -> dict[Any, Any]:
    seen: set[Any] = set()
    for key_node, _ in node.value:
        key = loader.construct_object(key_node, deep=deep)
        if key in seen:
            raise yaml.constructor.ConstructorError(None, None, f"duplicate key {key!r}", key_node.start_mark)
        seen.add(key)
    return loader.construct_mapping(node, deep=deep)


_UniqueKeyLoader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _construct_mapping)


def _line_map(node: yaml.Node | None, path: Path_, out: dict[Path_, int]) -> None:
    if node is None:
        return
    out.setdefault(path, node.start_mark.line + 1)
    if isinstance(node, yaml.MappingNode):
        for key_node, value_node in node.value:
            key = (*path, str(key_node.value))
            out[key] = key_node.start_mark.line + 1
            _line_map(value_node, key, out)
            out[key] = key_node.start_mark.line + 1
    elif isinstance(node, yaml.SequenceNode):
        for i, item in enumerate(node.value):
            _line_map(item, (*path, i), out)


def parse_recipe(
    text: str, source: str = "<recipe>", overrides: typing.Sequence[str] = (), folder: str | None = None
) -> LoadedRecipe:
    """Parse recipe ``text``, apply ``overrides`` (``key=value``) and convert it to a :class:`Recipe`."""
    try:
        node = yaml.compose(text, Loader=_UniqueKeyLoader)
        data = yaml.load(text, Loader=_UniqueKeyLoader)
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        line = mark.line + 1 if mark is not None else None
        raise RecipeError(f"not valid YAML: {exc.problem or exc}", source=source, line=line) from None
    except yaml.YAMLError as exc:
        raise RecipeError(f"not valid YAML: {exc}", source=source) from None
    if data is None:
        raise RecipeError("the recipe is empty; expected a mapping with keys name, task, optimizers", source=source)
    if not isinstance(data, dict):
        raise RecipeError(f"expected a mapping at the top level, got {_show(data)}", source=source, line=1)
    lines: dict[Path_, int] = {}
    _line_map(node, (), lines)
    for item in overrides:
        apply_override(data, item)
        lines.pop(tuple(_split_key(item.partition("=")[0])), None)
    recipe = _Converter(source, lines).convert(data, Recipe, ())
    return LoadedRecipe(recipe, source, lines, folder)


def load_recipe(path: str | Path, overrides: typing.Sequence[str] = ()) -> LoadedRecipe:
    """Read and convert the recipe file at ``path`` (see :func:`parse_recipe`)."""
    p = Path(path)
    try:
        text = p.read_text()
    except OSError as exc:
        raise RecipeError(f"cannot read the recipe: {exc.strerror}", source=str(p)) from None
    return parse_recipe(text, str(p), overrides, folder=str(p.resolve().parent))


def _split_key(key: str) -> list[str | int]:
    return [int(part) if part.isdigit() else part for part in key.split(".")]


def apply_override(data: dict[str, Any], item: str) -> None:
    """Set ``key=value`` in ``data``: a dotted key (list items by index), a YAML value.

    Example: ``sweep.seeds=[0, 1]``, ``optimizers.0.base=sgd``, ``task.steps=50``.
    """
    key, sep, raw = item.partition("=")
    if not sep or not key.strip():
        raise RecipeError(f"expected key=value, got {item!r}", source="--set")
    try:
        value = yaml.safe_load(raw) if raw.strip() else ""
    except yaml.YAMLError as exc:
        raise RecipeError(f"the value is not valid YAML: {exc}", source="--set", key=key) from None
    parts = _split_key(key.strip())
    target: Any = data
    for i, part in enumerate(parts[:-1]):
        nxt = parts[i + 1]
        if isinstance(target, list):
            if not isinstance(part, int) or part >= len(target):
                raise RecipeError(f"no list item {part} here (the list has {len(target)})", source="--set", key=key)
            target = target[part]
        elif isinstance(target, dict):
            if target.get(part) is None:
                target[part] = [] if isinstance(nxt, int) else {}
            target = target[part]
        else:
            raise RecipeError(f"{_fmt_path(tuple(parts[: i + 1]))} is not a mapping or list", source="--set", key=key)
    last = parts[-1]
    if isinstance(target, list):
        if not isinstance(last, int) or last >= len(target):
            raise RecipeError(f"no list item {last} here (the list has {len(target)})", source="--set", key=key)
        target[last] = value
    elif isinstance(target, dict):
        target[str(last)] = value
    else:
        raise RecipeError("the parent of this key is not a mapping or list", source="--set", key=key)


def recipe_to_dict(recipe: Recipe) -> dict[str, Any]:
    """The resolved recipe as plain data: every default filled in, the step sizes as a list.

    The tolerance keeps the keys of its one rule, numbers filled in, the other rule's keys null.
    """
    data = dataclasses.asdict(recipe)
    data["sweep"]["lr"] = recipe.sweep.lrs()
    data["tolerance"] = dataclasses.asdict(recipe.tolerance.resolved())
    return data
