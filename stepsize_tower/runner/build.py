"""Build what one trial needs from recipe sections: the task instance, the optimizer, its schedule."""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import torch
from torch.optim import Optimizer, lr_scheduler

from ..factory import BASES, make_tower
from ..tasks import get_task
from ..tasks.base import TaskInstance
from ..tasks.compose import compose_task
from .schema import ScheduleConfig, TaskConfig
from .user_task import build_user_task

__all__ = ["build_optimizer", "build_schedule", "build_task", "resolve_steps", "torch_optimizer_class"]


def build_task(cfg: TaskConfig, seed: int, search_path: Sequence[str] = ()) -> TaskInstance:
    """A fresh task instance for ``seed`` from the recipe's ``task`` section."""
    steps = cfg.steps or 300
    if cfg.builtin is not None:
        return get_task(cfg.builtin).build(seed)
    if cfg.user is not None:
        return build_user_task(
            cfg.user,
            seed,
            options=cfg.options,
            batch_size=cfg.batch_size,
            loss=cfg.loss,
            steps=steps,
            search_path=search_path,
        )
    assert cfg.dataset is not None and cfg.model is not None  # enforced by the checks
    return compose_task(
        cfg.dataset,
        cfg.model,
        seed,
        batch_size=cfg.batch_size,
        hidden=cfg.hidden,
        loss=cfg.loss,
        test_fraction=cfg.test_fraction,
        steps=steps,
    )


def resolve_steps(cfg: TaskConfig, task: TaskInstance) -> int:
    """The step budget: ``steps``, or ``epochs`` × steps per epoch, or the task's default."""
    if cfg.steps is not None:
        return cfg.steps
    if cfg.epochs is not None:
        if task.steps_per_epoch is None:
            raise ValueError(f"task {task.name!r} has no fixed epoch length; give task.steps instead of task.epochs")
        return max(1, math.ceil(cfg.epochs * task.steps_per_epoch))
    return task.default_steps


def torch_optimizer_class(name: str) -> type[Optimizer]:
    """The ``torch.optim`` optimizer class called ``name`` (``SGD``, ``Adam``, …)."""
    cls = getattr(torch.optim, name, None)
    if not (isinstance(cls, type) and issubclass(cls, Optimizer)) or cls is Optimizer:
        known = sorted(
            n
            for n, c in vars(torch.optim).items()
            if isinstance(c, type) and issubclass(c, Optimizer) and c is not Optimizer
        )
        raise KeyError(f"{name!r} is not a torch.optim optimizer; expected one of {', '.join(known)}")
    return cls


def _plain(options: dict[str, Any]) -> dict[str, Any]:
    # YAML has no tuples: torch and the towers take betas as a pair
    return {k: tuple(v) if k == "betas" and isinstance(v, list) else v for k, v in options.items()}


def build_optimizer(kind: str, base: str, params: Any, lr: float, depth: int, options: dict[str, Any]) -> Optimizer:
    """A tower (``kind == "tower"``, base ``sgd``/``adam``/``adamw``) or a ``torch.optim`` optimizer."""
    if kind == "tower":
        if base not in BASES:
            raise KeyError(f"{base!r} is not a tower base; expected one of {', '.join(BASES)}")
        return make_tower(params, base, depth, lr=lr, **_plain(options))
    cls: Any = torch_optimizer_class(base)
    return cls(params, lr=lr, **_plain(options))  # type: ignore[no-any-return]


def build_schedule(cfg: ScheduleConfig | None, optimizer: Optimizer, steps: int) -> Any | None:
    """The ``torch.optim.lr_scheduler`` object for ``cfg`` over ``steps`` steps (None without one)."""
    if cfg is None:
        return None
    rest = max(1, steps - cfg.warmup_steps)
    main: lr_scheduler.LRScheduler
    if cfg.kind == "cosine":
        base_lr = optimizer.param_groups[0]["lr"]
        main = lr_scheduler.CosineAnnealingLR(optimizer, T_max=rest, eta_min=cfg.final_factor * float(base_lr))
    elif cfg.kind == "linear":
        main = lr_scheduler.LinearLR(optimizer, start_factor=1.0, end_factor=cfg.final_factor, total_iters=rest)
    elif cfg.kind == "step":
        main = lr_scheduler.StepLR(optimizer, step_size=cfg.step_size, gamma=cfg.gamma)
    else:
        main = lr_scheduler.ExponentialLR(optimizer, gamma=cfg.gamma)
    if cfg.warmup_steps <= 0:
        return main
    warm = lr_scheduler.LinearLR(optimizer, start_factor=1.0 / cfg.warmup_steps, total_iters=cfg.warmup_steps)
    return lr_scheduler.SequentialLR(optimizer, [warm, main], milestones=[cfg.warmup_steps])
