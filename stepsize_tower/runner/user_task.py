"""User-defined tasks: ``package.module:function`` imported (never evaluated) and called with a seed.

The function is called as ``function(seed, **task.options)`` with the global torch RNG seeded
from ``seed`` and must return either

* a :class:`stepsize_tower.tasks.TaskInstance`, used as is, or
* a mapping with ``model`` (an ``nn.Module``), ``train`` (a pair of tensors ``(x, y)``),
  optionally ``test`` (a pair, held-out data), ``loss`` (``"cross_entropy"``, ``"mse"`` or
  a callable ``loss(model, (x, y)) -> scalar tensor``) and ``metrics`` (a mapping of name
  to ``metric(model) -> float``). The runner makes seeded minibatches of the recipe's
  ``batch_size`` from ``train``.

The module is looked up on ``sys.path`` after the recipe's own folder and the current
directory, so a ``my_task.py`` next to the recipe is found as ``my_task:build``.
"""

from __future__ import annotations

import importlib
import re
import sys
from collections.abc import Callable, Mapping, Sequence
from typing import Any

import torch
from torch import Tensor, nn

from ..tasks.base import LossFn, TaskInstance, supervised_instance
from ..tasks.compose import LOSSES

__all__ = ["CONTRACT", "UserTaskError", "build_user_task", "import_function"]

CONTRACT = (
    "a user function must return a TaskInstance, or a mapping with 'model' (nn.Module) and 'train' "
    "((x, y) tensors), optionally 'test' ((x, y)), 'loss' ('cross_entropy', 'mse' or loss(model, (x, y))) "
    "and 'metrics' ({name: metric(model) -> float})"
)

_TARGET = re.compile(r"^[A-Za-z_][\w]*(\.[A-Za-z_][\w]*)*:[A-Za-z_][\w]*$")


class UserTaskError(Exception):
    """The user function cannot be imported, raised, or returned the wrong thing."""


def import_function(target: str, search_path: Sequence[str] = ()) -> Callable[..., Any]:
    """Import ``package.module:function``, looking in ``search_path`` first."""
    if not _TARGET.match(target):
        raise UserTaskError(f"expected 'package.module:function' (dotted module, a colon, a name), got {target!r}")
    module_name, _, attr = target.partition(":")
    for folder in reversed(search_path):
        if folder not in sys.path:
            sys.path.insert(0, folder)
    try:
        module = importlib.import_module(module_name)
    except ModuleNotFoundError as exc:
        raise UserTaskError(
            f"cannot import module {module_name!r} ({exc}); it is looked up in the recipe's folder, "
            "the current directory and the Python path"
        ) from None
    except Exception as exc:
        raise UserTaskError(f"importing {module_name!r} raised {type(exc).__name__}: {exc}") from exc
    fn = getattr(module, attr, None)
    if fn is None or not callable(fn):
        raise UserTaskError(f"module {module_name!r} has no function {attr!r}")
    return fn  # type: ignore[no-any-return]


def _pair(value: Any, key: str) -> tuple[Tensor, Tensor]:
    if (
        not isinstance(value, Sequence)
        or len(value) != 2
        or not all(isinstance(v, Tensor) for v in value)
        or value[0].shape[0] != value[1].shape[0]
    ):
        raise UserTaskError(f"{key!r} must be a pair of tensors (x, y) with the same number of rows; {CONTRACT}")
    return value[0], value[1]


def build_user_task(
    target: str,
    seed: int,
    *,
    options: Mapping[str, Any] | None = None,
    batch_size: int = 64,
    loss: str = "auto",
    steps: int = 300,
    search_path: Sequence[str] = (),
) -> TaskInstance:
    """Call the user function for ``seed`` and wrap what it returns into a :class:`TaskInstance`."""
    fn = import_function(target, search_path)
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(seed)
        try:
            out = fn(seed, **dict(options or {}))
        except UserTaskError:
            raise
        except TypeError as exc:
            raise UserTaskError(f"calling {target}(seed, **options) failed: {exc}") from exc
    if isinstance(out, TaskInstance):
        return out
    if not isinstance(out, Mapping):
        raise UserTaskError(f"{target} returned {type(out).__name__}; {CONTRACT}")
    unknown = set(out) - {"model", "train", "test", "loss", "metrics"}
    if unknown:
        raise UserTaskError(f"{target} returned unknown keys {sorted(unknown)}; {CONTRACT}")
    model = out.get("model")
    if not isinstance(model, nn.Module):
        raise UserTaskError(f"'model' must be an nn.Module, got {type(model).__name__}; {CONTRACT}")
    if "train" not in out:
        raise UserTaskError(f"the mapping has no 'train' data; {CONTRACT}")
    xs, ys = _pair(out["train"], "train")
    xt, yt = _pair(out["test"], "test") if out.get("test") is not None else (xs, ys)
    loss_fn = _loss(out.get("loss", loss), ys)
    metrics = out.get("metrics") or {}
    if not isinstance(metrics, Mapping) or not all(callable(m) for m in metrics.values()):
        raise UserTaskError(f"'metrics' must map names to callables metric(model) -> float; {CONTRACT}")
    if batch_size > xs.shape[0]:
        raise UserTaskError(f"batch_size {batch_size} is larger than the {xs.shape[0]} training rows")
    return supervised_instance(
        target,
        model,
        loss_fn,
        (xs, ys),
        (xt, yt),
        batch_size=batch_size,
        seed=seed,
        steps=steps,
        metrics=metrics,
        epochs=True,
    )


def _loss(spec: Any, y: Tensor) -> LossFn:
    if callable(spec):
        return spec  # type: ignore[no-any-return]
    if spec == "auto":
        spec = "mse" if y.is_floating_point() else "cross_entropy"
    if spec not in LOSSES:
        raise UserTaskError(f"'loss' must be 'cross_entropy', 'mse' or a callable, got {spec!r}")
    return LOSSES[spec]
