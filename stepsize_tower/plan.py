"""What one step of a parameter group will do, decided once from its options and state."""

from __future__ import annotations

import weakref
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import torch
from torch import Tensor

from . import horizon as horizon_rules
from . import lag
from .bases import BaseRule
from .group_state import levels_of
from .host_clock import Clock
from .lag import LAG_KEY
from .levels import Level
from .safeguards import RETREAT_WINDOW

__all__ = ["Batch", "Plan", "host_lr", "lr_tensor", "make_plan", "unit_index"]


@dataclass(frozen=True)
class Batch:
    """The tensors of a group that have a gradient this step (this rank's shards under FSDP2)."""

    params: list[Tensor]
    grads: list[Tensor]
    states: list[dict[str, Any]]
    #: Index of each parameter among the group's parameters (its unit with ``granularity="tensor"``).
    indices: list[int]


@dataclass(frozen=True)
class Plan:
    """The flags of one step of one group (each derived once, here)."""

    levels: tuple[Level, ...]
    units: int
    #: The unit of each tensor of the batch; ``unit_index`` the same as a tensor (None: one unit).
    unit_of: list[int]
    unit_index: Tensor | None
    #: ``a_{0,s-1}`` per unit, and ``group["lr"]`` as a [1] float64 tensor.
    a_prev: Tensor
    lr0: Tensor
    #: The largest decay of the trail (0: none; :func:`stepsize_tower.horizon.longest`).
    horizon: float
    #: This step's trail weight ω_s = 1 - γ_s: a float on the host's read path, a 0-dim float64
    #: tensor on masked steps of a growing horizon (the count is not read there).
    trail_weight: float | Tensor
    sharded: bool
    learns_hyperparams: bool
    steps_taken: int
    #: The growth search is on and some unit still searches; its largest move per step.
    searching: bool
    search_max_move: float | None
    #: The start-up test runs (the loss rose along the last step: retreat).
    startup_test: bool
    #: The first step is checked for an overshoot hidden by clipping (:mod:`stepsize_tower.clipping`):
    #: its gradient is measured on steps 0 and 1, the test runs on step 1 (and its retries).
    clip_check: bool
    #: SGD's blow-up guard runs (the largest gradient entry blew up: retreat).
    blowup_guard: bool
    #: The one-step dot products ``<g_s, d_{0,s-1}>`` are needed (no trail, or a test uses them).
    exact: bool
    #: After the start-up window: nothing depends on the step count, and the step reads nothing.
    settled: bool
    #: A settled step that takes the masked path (no host read; :mod:`stepsize_tower.engine`).
    masked: bool
    #: The trail hypergradient is the one kept from the last taken step (option ``lagged``,
    #: settled steps, not exact): ``ts["lag_dot"]``, already divided by its trail weight.
    lagged: bool
    #: ``group["lr"]`` is above its largest value of the taken steps (the first step, a warm-up).
    rising: bool
    #: ``group["lr"]`` is below that largest value: a schedule is annealing it
    #: (:mod:`stepsize_tower.schedule_anneal`).
    annealing: bool


#: ``(name, id(step tensor)) -> (weak reference to it, the value, its tensor)``, per group. Not
#: a ``WeakKeyDictionary``: its lookups compare tensors with ``==``, a host read (host_clock.py).
_MADE: dict[tuple[str, int], tuple[weakref.ref[Tensor], Any, Tensor]] = {}


def _made_once(name: str, step: Tensor, value: Any, make: Callable[[], Tensor]) -> Tensor:
    """``make()``, kept for the group whose step counter is ``step`` while ``value`` is unchanged:
    a host-to-device copy per step is neither free nor capturable in a CUDA graph. The kept
    tensor is never written in place; a new value makes a new tensor."""
    key = (name, id(step))
    kept = _MADE.get(key)
    if kept is not None and kept[0]() is step and kept[1] == value and kept[2].device == step.device:
        return kept[2]
    made = make()
    _MADE[key] = (weakref.ref(step, lambda _: _MADE.pop(key, None)), value, made)
    return made


def lr_tensor(group: dict[str, Any], ts: dict[str, Tensor]) -> Tensor:
    """``group["lr"]`` as a float64 tensor of shape [1] on the group's device, made once per
    value: a float ``lr`` that does not change costs no host-to-device copy per step."""
    lr, device = group["lr"], ts["step"].device
    if isinstance(lr, Tensor):
        return torch.as_tensor(lr, dtype=torch.float64, device=device).reshape(1)
    return _made_once("lr", ts["step"], lr, lambda: torch.as_tensor(lr, dtype=torch.float64, device=device).reshape(1))


def unit_index(unit_of: list[int], ts: dict[str, Tensor]) -> Tensor:
    """The unit of each tensor of the batch as an index tensor on the group's device, made
    once per set of tensors with a gradient (the same every step in the usual loop)."""
    device = ts["step"].device
    return _made_once("units", ts["step"], tuple(unit_of), lambda: torch.tensor(unit_of, device=device))


def make_plan(
    group: dict[str, Any],
    ts: dict[str, Tensor],
    rule: BaseRule,
    batch: Batch,
    sharded: bool,
    clock: Clock,
    masks: bool = False,
) -> Plan:
    """The step's flags, from the host's ``clock`` of the group (no read). ``masks``: settled
    steps of this group take the masked path (the host's count is then only a lower bound)."""
    levels = levels_of(group)
    units = ts["log_step"].shape[0]
    per_tensor = group["granularity"] == "tensor"
    unit_of = list(batch.indices) if per_tensor else [0] * len(batch.params)
    lr0 = lr_tensor(group, ts)
    search_max_move = group.get("growth_search") if levels and "search" in ts else None
    steps_taken, searching = clock.steps_taken, clock.searching and search_max_move is not None
    horizon = horizon_rules.longest(group["horizon"])
    lr = host_lr(group)
    # The start-up test runs in the first steps and for as long as the growth search goes on.
    startup_test = bool(group["retreat"]) and bool(levels) and (steps_taken < RETREAT_WINDOW or searching)
    exact = horizon == 0 or startup_test or searching
    return Plan(
        levels=levels,
        units=units,
        unit_of=unit_of,
        unit_index=unit_index(unit_of, ts) if per_tensor else None,
        a_prev=ts["prev_step"][:, 0] if levels else ts.get("prev_lr", lr0).expand(units),
        lr0=lr0,
        horizon=horizon,
        trail_weight=_trail_weight(group["horizon"], ts, clock, masks),
        sharded=sharded,
        learns_hyperparams="hyper_value" in ts,
        steps_taken=steps_taken,
        searching=searching,
        search_max_move=search_max_move,
        startup_test=startup_test,
        clip_check=startup_test and steps_taken <= 1,
        blowup_guard=bool(group["retreat"]) and bool(levels) and not rule.normalized,
        exact=exact,
        settled=clock.settled,
        masked=clock.settled and masks,
        lagged=not exact and clock.settled and lag.wanted(group, horizon) and LAG_KEY in ts,
        rising=bool(levels) and lr is not None and lr > clock.peak_lr,
        annealing=bool(levels) and lr is not None and lr < clock.peak_lr,
    )


def _trail_weight(horizon: Any, ts: dict[str, Tensor], clock: Clock, masks: bool) -> float | Tensor:
    """ω_s from the host's count where it is exact, else (masked settled steps, where the host
    stops following the count) from the step-count tensor, with no read."""
    if horizon_rules.is_growing(horizon) and clock.settled and masks:
        return horizon_rules.weight_tensor(horizon, ts["step"])
    return horizon_rules.weight_at(horizon, clock.steps_taken)


def host_lr(group: dict[str, Any]) -> float | None:
    """``group["lr"]`` as a Python float, or None when it is a tensor (not read: no host sync)."""
    lr = group["lr"]
    return None if isinstance(lr, Tensor) else float(lr)
