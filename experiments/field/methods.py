"""The methods compared on every task, and how each builds its optimizer and scheduler.

* ``fixed``: the ``torch.optim`` optimizer at a fixed ``lr`` (Adam, AdamW on the
  transformer, or SGD);
* ``cosine``: the same with 5 % linear warm-up and cosine decay to 0 (``LambdaLR``);
* ``tower``: the tower (TowerAdam, TowerAdamW, TowerSGD) with defaults, only ``lr`` typed;
* ``tower_cosine``: the tower under the same warm-up + cosine ``LambdaLR``; the tower treats
  ``group["lr"]`` as an outer factor on its learned step size, so the schedule shapes it.

Each task fixes its base optimizers' other settings (momentum, betas, weight decay) once,
for the baseline and the tower alike.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import torch

from stepsize_tower import TowerAdam, TowerAdamW, TowerSGD

from .recorder import MakeOptimizer

FIXED, COSINE, TOWER, TOWER_COSINE = "fixed", "cosine", "tower", "tower_cosine"
METHODS = (FIXED, COSINE, TOWER, TOWER_COSINE)
TOWER_METHODS = (TOWER, TOWER_COSINE)
BASELINE_METHODS = (FIXED, COSINE)
WARMUP_FRACTION = 0.05

#: Base name → (torch.optim class, tower class).
BASE_CLASSES: dict[str, tuple[Callable[..., torch.optim.Optimizer], Callable[..., torch.optim.Optimizer]]] = {
    "adam": (torch.optim.Adam, TowerAdam),
    "adamw": (torch.optim.AdamW, TowerAdamW),
    "sgd": (torch.optim.SGD, TowerSGD),
}

#: Per task and base: keyword arguments shared by the baseline and the tower.
BASE_KWARGS: dict[str, dict[str, dict[str, Any]]] = {
    "word_lstm": {"adam": {}, "sgd": {}},  # plain SGD: the classic recipe for this model
    "char_transformer": {"adamw": {"betas": (0.9, 0.99)}, "sgd": {"momentum": 0.9}},
    "resnet_digits": {"adam": {}, "sgd": {"momentum": 0.9}},
    "lsq_raw": {"adam": {}, "sgd": {}},
}


def warmup_cosine(steps: int) -> Callable[[int], float]:
    """Factor for ``LambdaLR``: linear from 1/w to 1 over w = 5 % of the steps, then cosine to 0."""
    warm = max(1, round(WARMUP_FRACTION * steps))

    def factor(s: int) -> float:
        if s < warm:
            return (s + 1) / warm
        progress = min(1.0, (s - warm) / max(1, steps - warm))
        return 0.5 * (1.0 + math.cos(math.pi * progress))

    return factor


def optimizer_factory(task: str, base: str, method: str, lr: float) -> MakeOptimizer:
    """``make_optimizer(params, steps) -> (optimizer, scheduler or None)`` for one run."""
    if method not in METHODS:
        raise ValueError(f"Unknown method {method!r}; expected one of {METHODS}")
    fixed_cls, tower_cls = BASE_CLASSES[base]
    kwargs = BASE_KWARGS[task][base]

    def make(params: Any, steps: int) -> tuple[torch.optim.Optimizer, Any]:
        cls = tower_cls if method in TOWER_METHODS else fixed_cls
        opt = cls(params, lr=lr, **kwargs)
        sched = None
        if method in (COSINE, TOWER_COSINE):
            sched = torch.optim.lr_scheduler.LambdaLR(opt, warmup_cosine(steps))
        return opt, sched

    return make


@dataclass(frozen=True)
class Grid:
    """The lrs of one task, base and method, split into a first (core) and a later part."""

    core: tuple[float, ...]
    extra: tuple[float, ...] = ()


def _decades(lo: int, hi: int) -> tuple[float, ...]:
    return tuple(10.0**k for k in range(lo, hi + 1))


ADAM_TOWER = _decades(-6, 0)
SGD_TOWER = _decades(-3, 3)

#: Per task: (base, method) → grid. Core points run first (for every seed), extras after.
GRIDS: dict[str, dict[tuple[str, str], Grid]] = {
    "word_lstm": {
        ("adam", FIXED): Grid((3e-4, 1e-3, 3e-3, 1e-2, 3e-2), (1e-5, 1e-4, 1e-1, 1.0)),
        ("adam", COSINE): Grid((1e-3, 3e-3, 1e-2, 3e-2), (3e-4,)),
        ("sgd", FIXED): Grid((3.0, 10.0, 30.0, 100.0), (1e-3, 1e-2, 1e-1, 1.0, 1e3)),
        ("adam", TOWER): Grid(ADAM_TOWER),
        ("sgd", TOWER): Grid(SGD_TOWER),
        ("adam", TOWER_COSINE): Grid((1e-4, 1e-2, 1.0)),
    },
    "char_transformer": {
        ("adamw", FIXED): Grid((3e-4, 1e-3, 3e-3, 1e-2), (1e-5, 1e-4, 3e-2, 1e-1, 1.0)),
        ("adamw", COSINE): Grid((1e-3, 3e-3, 1e-2, 3e-2), (1e-4, 3e-4)),
        ("adamw", TOWER): Grid(ADAM_TOWER),
        ("adamw", TOWER_COSINE): Grid((1e-4, 1e-2, 1.0)),
        ("sgd", FIXED): Grid((), (1e-3, 1e-2, 1e-1, 1.0, 10.0)),
        ("sgd", TOWER): Grid((), SGD_TOWER),
    },
    "resnet_digits": {
        ("adam", FIXED): Grid((1e-4, 3e-4, 1e-3, 3e-3, 1e-2, 3e-2, 1e-1), (1e-5, 1.0)),
        ("adam", COSINE): Grid((1e-3, 3e-3, 1e-2)),
        ("sgd", FIXED): Grid((1e-2, 3e-2, 1e-1, 3e-1, 1.0), (1e-3, 10.0)),
        ("adam", TOWER): Grid(ADAM_TOWER),
        ("sgd", TOWER): Grid(SGD_TOWER),
        ("adam", TOWER_COSINE): Grid((1e-4, 1e-2, 1.0)),
    },
    "lsq_raw": {
        ("adam", FIXED): Grid(tuple(10.0 ** (k / 2) for k in range(-10, 1))),
        ("sgd", FIXED): Grid(tuple(10.0 ** (k / 2) for k in range(-20, 1))),
        ("adam", TOWER): Grid(ADAM_TOWER),
        ("sgd", TOWER): Grid(SGD_TOWER),
    },
}

TASK_ORDER = ("word_lstm", "char_transformer", "resnet_digits", "lsq_raw")
#: The expensive tasks (about 1-2 min per run on one shared thread); they run first.
LM_TASKS = ("word_lstm", "char_transformer")
