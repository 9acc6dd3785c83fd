"""Semantic checks of a converted recipe: names exist, numbers are in range, everything builds.

:func:`check_recipe` raises :class:`RecipeError` pointing at the offending key and line. It
builds the task once (first seed) and every optimizer configuration once on its model, so a
recipe that passes will not fail for a reason the recipe could have said up front.
"""

from __future__ import annotations

import math
from typing import Any

from ..tasks import TASKS
from ..tasks.compose import DATASETS, MODELS, load_dataset
from .build import build_optimizer, build_schedule, build_task, resolve_steps, torch_optimizer_class
from .schema import LoadedRecipe, LogRange
from .user_task import UserTaskError, import_function

__all__ = ["BUILTIN_METRICS", "check_recipe", "search_path"]

#: Metrics every trial reports.
BUILTIN_METRICS = ("train_loss", "test_loss")


def search_path(loaded: LoadedRecipe) -> list[str]:
    """Folders searched first for user task modules: the recipe's folder, then the current directory."""
    import os

    return [p for p in (loaded.folder, os.getcwd()) if p]


def _suggest(name: str, choices: Any) -> str:
    import difflib

    close = difflib.get_close_matches(name, list(choices), n=1)
    return f" (did you mean {close[0]!r}?)" if close else ""


def _check_task(loaded: LoadedRecipe) -> None:
    t = loaded.recipe.task
    err = loaded.error
    given = [k for k in ("builtin", "dataset", "user") if getattr(t, k) is not None]
    if len(given) != 1:
        raise err(
            ("task",),
            "give exactly one of 'builtin' (a built-in task), 'dataset' with 'model', or 'user' "
            f"(package.module:function); got {', '.join(given) or 'none'}",
        )
    if t.builtin is not None and t.builtin not in TASKS:
        raise err(
            ("task", "builtin"),
            f"unknown built-in task {t.builtin!r}{_suggest(t.builtin, TASKS)}; expected one of {', '.join(TASKS)}",
        )
    if t.dataset is not None:
        if t.dataset not in DATASETS:
            raise err(
                ("task", "dataset"),
                f"unknown dataset {t.dataset!r}{_suggest(t.dataset, DATASETS)}; expected one of {', '.join(DATASETS)}",
            )
        if t.model is None:
            raise err(("task",), f"'dataset' needs a 'model', one of {', '.join(MODELS)}")
    if t.model is not None:
        if t.dataset is None:
            raise err(("task", "model"), "'model' goes with 'dataset'; for your own model use 'user'")
        if t.model not in MODELS:
            raise err(
                ("task", "model"),
                f"unknown model {t.model!r}{_suggest(t.model, MODELS)}; expected one of {', '.join(MODELS)}",
            )
        if t.model == "cnn" and t.dataset is not None and not load_dataset(t.dataset).is_image:
            raise err(("task", "model"), f"model 'cnn' needs an image dataset; {t.dataset!r} is tabular")
    if t.user is not None:
        try:
            import_function(t.user, search_path(loaded))
        except UserTaskError as exc:
            raise err(("task", "user"), str(exc)) from None
    elif t.options:
        raise err(("task", "options"), "'options' are arguments of a 'user' function; this task has none")
    for key in ("batch_size", "steps", "eval_every"):
        value = getattr(t, key)
        low = 0 if key == "eval_every" else 1
        if value is not None and value < low:
            raise err(("task", key), f"expected an integer >= {low}, got {value}")
    if t.epochs is not None and t.epochs <= 0:
        raise err(("task", "epochs"), f"expected a positive number, got {t.epochs}")
    if t.steps is not None and t.epochs is not None:
        raise err(("task", "epochs"), "give 'steps' or 'epochs', not both")
    if not 0.0 < t.test_fraction < 1.0:
        raise err(("task", "test_fraction"), f"expected a number in (0, 1), got {t.test_fraction}")
    for i, h in enumerate(t.hidden):
        if h < 1:
            raise err(("task", "hidden", i), f"expected a width >= 1, got {h}")


def _check_sweep(loaded: LoadedRecipe) -> None:
    s = loaded.recipe.sweep
    err = loaded.error
    if isinstance(s.lr, LogRange):
        if s.lr.low <= 0 or s.lr.high <= 0:
            raise err(("sweep", "lr"), f"step sizes must be positive; got low={s.lr.low}, high={s.lr.high}")
        if s.lr.high < s.lr.low:
            raise err(("sweep", "lr", "high"), f"expected high >= low ({s.lr.low}), got {s.lr.high}")
        if s.lr.points < 1:
            raise err(("sweep", "lr", "points"), f"expected at least 1 point, got {s.lr.points}")
    else:
        if not s.lr:
            raise err(("sweep", "lr"), "the grid of step sizes is empty; give at least one positive number")
        for i, lr in enumerate(s.lr):
            if not lr > 0:
                raise err(("sweep", "lr", i), f"expected a positive step size, got {lr}")
    for key in ("depths", "seeds"):
        values = getattr(s, key)
        if not values:
            raise err(("sweep", key), f"the grid of {key} is empty; give at least one")
        for i, v in enumerate(values):
            if v < 0:
                raise err(("sweep", key, i), f"expected an integer >= 0, got {v}")
        if len(set(values)) != len(values):
            raise err(("sweep", key), f"repeated values in {values}")
    for key, values in s.options.items():
        if not values:
            raise err(("sweep", "options", key), "the grid is empty; give at least one value")
        if key in ("lr", "depth", "levels"):
            raise err(("sweep", "options", key), f"sweep {key!r} with sweep.lr / sweep.depths, not options")


def _check_optimizers(loaded: LoadedRecipe) -> None:
    r = loaded.recipe
    err = loaded.error
    if not r.optimizers:
        raise err(("optimizers",), "no optimizer configurations; give at least one")
    labels = [o.label for o in r.optimizers]
    for i, label in enumerate(labels):
        if labels.index(label) != i:
            raise err(("optimizers", i), f"two configurations are named {label!r}; give each a distinct 'name'")
    from ..factory import BASES

    for i, o in enumerate(r.optimizers):
        if o.kind == "tower" and o.base not in BASES:
            raise err(
                ("optimizers", i, "base"),
                f"unknown tower base {o.base!r}{_suggest(o.base, BASES)}; expected one of {', '.join(BASES)}",
            )
        if o.kind == "fixed":
            try:
                torch_optimizer_class(o.base)
            except KeyError as exc:
                raise err(("optimizers", i, "base"), str(exc.args[0])) from None
            if o.depths is not None:
                raise err(("optimizers", i, "depths"), "a fixed-rate configuration has no depth")
        for key in ("lr", "depth", "levels", "params"):
            if key in o.options:
                raise err(("optimizers", i, "options", key), f"{key!r} is set by the sweep, not by options")
        if o.depths is not None:
            if not o.depths:
                raise err(("optimizers", i, "depths"), "the list of depths is empty")
            for j, d in enumerate(o.depths):
                if d < 0:
                    raise err(("optimizers", i, "depths", j), f"expected a depth >= 0, got {d}")
        sch = o.schedule
        if sch is not None:
            if sch.final_factor < 0 or sch.final_factor > 1:
                raise err(("optimizers", i, "schedule", "final_factor"), "expected a number in [0, 1]")
            if sch.step_size < 1 or sch.warmup_steps < 0:
                raise err(("optimizers", i, "schedule"), "step_size must be >= 1 and warmup_steps >= 0")
            if not 0 < sch.gamma <= 1:
                raise err(("optimizers", i, "schedule", "gamma"), f"expected a number in (0, 1], got {sch.gamma}")


def _check_rest(loaded: LoadedRecipe) -> None:
    r = loaded.recipe
    err = loaded.error
    if not r.name.strip() or any(c in r.name for c in "/\\"):
        raise err(("name",), f"expected a non-empty name without slashes, got {r.name!r}")
    _check_tolerance(loaded)
    res = r.resources
    if res.workers is not None and res.workers < 1:
        raise err(("resources", "workers"), f"expected at least 1 worker, got {res.workers}")
    if res.threads < 1 or res.log_every < 1:
        raise err(("resources",), "threads and log_every must be >= 1")
    _check_executor(loaded)


def _check_tolerance(loaded: LoadedRecipe) -> None:
    tol = loaded.recipe.tolerance
    err = loaded.error
    if tol.gap is not None:
        for key in ("ratio", "slack"):
            if getattr(tol, key) is not None:
                raise err(
                    ("tolerance", key),
                    f"'{key}' belongs to the ratio band and 'gap' to the normalized-gap rule; give one rule: "
                    f"{{gap: {tol.gap:g}}} or {{ratio: 1.25, slack: 0.01}}, not both",
                )
        if not 0 <= tol.gap <= 1:
            raise err(
                ("tolerance", "gap"),
                f"expected a gap in [0, 1] (the share of the way from the initial loss to the best), got {tol.gap}",
            )
    if tol.ratio is not None and not tol.ratio >= 1:
        raise err(("tolerance", "ratio"), f"expected a ratio >= 1, got {tol.ratio}")
    if tol.slack is not None and tol.slack < 0:
        raise err(("tolerance", "slack"), f"expected a slack >= 0, got {tol.slack}")


def _check_executor(loaded: LoadedRecipe) -> None:
    res = loaded.recipe.resources
    err = loaded.error
    if res.executor != "dask":
        if res.address is not None:
            raise err(
                ("resources", "address"),
                f"'address' is the scheduler of executor 'dask', but this recipe runs on {res.executor!r}; "
                "set resources.executor: dask (or --executor dask), or remove address",
            )
        return
    from .dask_backend import NEEDS_ADDRESS, require_distributed
    from .executors import ExecutorError

    if res.address is None:
        raise err(("resources", "executor"), NEEDS_ADDRESS)
    if not res.address.strip() or any(c.isspace() for c in res.address):
        raise err(
            ("resources", "address"), f"expected a scheduler address such as tcp://10.0.0.5:8786, got {res.address!r}"
        )
    try:
        require_distributed()
    except ExecutorError as exc:
        raise err(("resources", "executor"), str(exc)) from None


def _check_build(loaded: LoadedRecipe) -> None:
    """Build the task for the first seed and every optimizer configuration on its model."""
    r = loaded.recipe
    err = loaded.error
    seed = r.sweep.seeds[0]
    try:
        task = build_task(r.task, seed, search_path(loaded))
    except (UserTaskError, ValueError, KeyError) as exc:
        key = "user" if r.task.user else ("builtin" if r.task.builtin else "dataset")
        raise err(("task", key), f"the task cannot be built: {exc.args[0] if exc.args else exc}") from None
    try:
        steps = resolve_steps(r.task, task)
    except ValueError as exc:
        raise err(("task", "epochs"), str(exc)) from None
    available = set(BUILTIN_METRICS) | set(task.metrics)
    for i, m in enumerate(r.task.metrics):
        if m not in available:
            raise err(
                ("task", "metrics", i),
                f"unknown metric {m!r}{_suggest(m, available)}; this task reports {', '.join(sorted(available))}",
            )
    lr = r.sweep.lrs()[0]
    for i, o in enumerate(r.optimizers):
        depths = [0] if o.kind == "fixed" else (o.depths or r.sweep.depths)
        option_sets = [dict(o.options)]
        for key, values in r.sweep.options.items():
            option_sets += [{**o.options, key: v} for v in values]
        for depth in depths:
            for options in option_sets:
                try:
                    opt = build_optimizer(o.kind, o.base, task.model.parameters(), lr, depth, options)
                    build_schedule(o.schedule, opt, steps)
                except (TypeError, ValueError, KeyError) as exc:
                    raise err(
                        ("optimizers", i), f"{o.label} (depth {depth}, options {options}) cannot be built: {exc}"
                    ) from None


def check_recipe(loaded: LoadedRecipe) -> None:
    """Raise :class:`RecipeError` for the first problem found in ``loaded``; return quietly otherwise."""
    _check_rest(loaded)
    _check_task(loaded)
    _check_sweep(loaded)
    _check_optimizers(loaded)
    if not all(math.isfinite(lr) for lr in loaded.recipe.sweep.lrs()):
        raise loaded.error(("sweep", "lr"), "step sizes must be finite")
    _check_build(loaded)
