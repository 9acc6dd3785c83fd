"""Where a parameter group keeps what it learns: ``group["tower"]``, and the published step size."""

from __future__ import annotations

import functools
from typing import Any

import torch
from torch import Tensor

from .hyperparams import init_hyperparam_state
from .levels import Level, init_tower_state

__all__ = ["EFFECTIVE_LR_KEY", "TOWER_KEY", "levels_of", "new_tower_state", "publish_effective_lr", "units_of"]

#: Group key of the learned state: a dict of float64 tensors (see :func:`init_tower_state`).
TOWER_KEY = "tower"

#: Group key under which every step publishes the level-0 step size in effect, a 0-dim float64
#: tensor (no host read): ``group["lr"] * exp(u_0)`` as used by the last taken step, or after a
#: retreat the step size the retried step was redone with (geometric mean over the group's
#: units with ``granularity="tensor"``). Absent until the group's first step; skipped steps
#: leave it unchanged. Monitors read it instead of ``group["lr"]``, the scheduler's outer factor.
EFFECTIVE_LR_KEY = "effective_lr"


def levels_of(group: dict[str, Any]) -> tuple[Level, ...]:
    """The group's levels (validated, immutable; cached: a step needs them every time)."""
    # A level saved before ``shrink`` or ``consistency`` existed had the plain rule: it resumes with it.
    return _levels_from(
        tuple(
            (s["kind"], s["lr"], tuple(s["betas"]), s["eps"], s.get("shrink", 1.0), s.get("consistency", 0.0))
            for s in group["levels"]
        )
    )


@functools.lru_cache(maxsize=256)
def _levels_from(key: tuple[tuple[str, float, tuple[float, ...], float, float, float], ...]) -> tuple[Level, ...]:
    return tuple(
        Level(kind=k, lr=lr, betas=(b[0], b[1]), eps=eps, shrink=shrink, consistency=c)
        for k, lr, b, eps, shrink, c in key
    )


def units_of(group: dict[str, Any]) -> int:
    """How many step sizes the group learns: one, or one per tensor (``granularity="tensor"``)."""
    return len(group["params"]) if group["granularity"] == "tensor" else 1


def new_tower_state(group: dict[str, Any], learned_initial: list[float], device: torch.device) -> dict[str, Tensor]:
    """Fresh learned state of a group: its levels, and the hyperparameters it learns (if any)."""
    ts = init_tower_state(levels_of(group), units_of(group), device)
    if learned_initial:
        ts.update(init_hyperparam_state(learned_initial, device))
    return ts


def publish_effective_lr(group: dict[str, Any], a0: Tensor) -> None:
    """Store the level-0 step size ``a0`` [units] under ``group[EFFECTIVE_LR_KEY]`` (a new 0-dim tensor)."""
    value = a0[0] if a0.shape[0] == 1 else a0.log().mean().exp()
    group[EFFECTIVE_LR_KEY] = value.detach().to(torch.float64).clone()
