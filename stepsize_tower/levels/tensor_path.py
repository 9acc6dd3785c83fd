"""The level step as tensor operations: no host read (accelerators, compiled steps).

See :mod:`stepsize_tower.levels` for the math; :mod:`.host_path` computes the same in floats.
"""

from __future__ import annotations

import functools
from collections.abc import Sequence

import torch
from torch import Tensor

from ..search import LOG_SPEEDUP, MAX_LOG_BOOST
from .spec import HYPERGRAD_BOUND, LOG_STEP_BOUND, MAX_LOG_CHANGE, Level

__all__ = ["moment_direction", "tower_step_tensors"]


@functools.lru_cache(maxsize=256)
def _level_constants(
    levels: tuple[Level, ...], dtype: torch.dtype, device: torch.device
) -> tuple[Tensor, Tensor, Tensor, Tensor]:
    """Per-level ``beta1, beta2, eps`` and the "adam" mask as tensors (cached; never written to)."""
    beta1 = torch.tensor([lv.betas[0] for lv in levels], dtype=dtype, device=device)
    beta2 = torch.tensor([lv.betas[1] for lv in levels], dtype=dtype, device=device)
    eps = torch.tensor([lv.eps for lv in levels], dtype=dtype, device=device)
    is_adam = torch.tensor([lv.kind == "adam" for lv in levels], device=device)
    return beta1, beta2, eps, is_adam


def moment_direction(m: Tensor, v: Tensor, bc1: Tensor, bc2: Tensor, eps: Tensor | float) -> Tensor:
    """A level of kind "adam": ``m̂ / (sqrt(v̂) + eps)`` with ``m̂ = m / bc1``, ``v̂ = v / bc2``."""
    return (m / bc1) / ((v / bc2).sqrt() + eps)


def _hypergradients(update_dot: Tensor, u: Tensor, prev_step: Tensor, prev_dir: Tensor) -> Tensor:
    """``ĥ_1 .. ĥ_D`` [U, D] from the values stored at the previous step (module docstring)."""
    h1 = -update_dot.to(u)
    chain = torch.cat([torch.ones_like(h1)[:, None], -prev_dir[:, :-1] * prev_step[:, 1:]], dim=1)
    return (h1[:, None] * torch.cumprod(chain, dim=1)).clamp(-HYPERGRAD_BOUND, HYPERGRAD_BOUND)


def _search_boost(ts: dict[str, Tensor], search_dot: Tensor, u: Tensor) -> tuple[Tensor, Tensor, Tensor]:
    """Per unit: the boost on level 1's move, the new search counter, and level 1's first moment
    (restarted where the search ends: it holds the search's growth)."""
    searched = ts["search"]
    going_on = (searched >= 0) & (search_dot.to(u) > 0)
    log_boost = (searched.clamp_min(0) * LOG_SPEEDUP).clamp_max(MAX_LOG_BOOST)
    boost = torch.where(going_on, log_boost.exp(), 1.0)
    new_search = torch.where(going_on, searched + 1, -1.0)
    ending = (searched >= 0) & ~going_on
    exp_avg = ts["exp_avg"].clone()
    exp_avg[:, 0] = torch.where(ending, 0.0, exp_avg[:, 0])
    return boost, new_search, exp_avg


def _directions(
    levels: Sequence[Level], hyper: Tensor, exp_avg: Tensor, exp_avg_sq: Tensor, count: Tensor
) -> tuple[Tensor, Tensor, Tensor]:
    """The new moments ``m, v`` and each level's direction ``d_k`` [U, D] from its hypergradient."""
    beta1, beta2, eps, is_adam = _level_constants(tuple(levels), hyper.dtype, hyper.device)
    m = torch.lerp(exp_avg, hyper, 1 - beta1)
    v = beta2 * exp_avg_sq + (1 - beta2) * hyper * hyper
    adam_dir = moment_direction(m, v, 1 - beta1**count, 1 - beta2**count, eps)
    if any(lv.consistency for lv in levels):
        power = torch.tensor([lv.consistency for lv in levels], dtype=hyper.dtype, device=hyper.device)
        lowers = adam_dir > 0  # u_{k-1} moves by -a_k d: a positive direction lowers the step size
        adam_dir = torch.where(lowers, adam_dir * adam_dir.clamp(0.0, 1.0) ** power, adam_dir)
    return m, v, torch.where(is_adam, adam_dir, hyper)


def _top_down(levels: Sequence[Level], u: Tensor, direction: Tensor, boost: Tensor | None, max_move: float) -> Tensor:
    """The new log step sizes: level k moves ``u_{k-1}`` with the step size ``a_k`` it was just given."""
    new_u = u.clone()
    step_k: Tensor | float = levels[-1].lr
    for k in range(len(levels), 0, -1):
        change = (step_k * direction[:, k - 1]).clamp(-MAX_LOG_CHANGE, MAX_LOG_CHANGE)
        if levels[k - 1].shrink != 1.0:
            change = torch.where(change > 0, change * levels[k - 1].shrink, change)
        if k == 1 and boost is not None:
            searched_move = torch.minimum(change, (change * boost).clamp_min(-max_move))
            change = torch.where((change < 0) & (boost > 1), searched_move, change)
        new_u[:, k - 1] = (u[:, k - 1] - change).clamp(-LOG_STEP_BOUND, LOG_STEP_BOUND)
        step_k = new_u[:, k - 1].exp()
    return new_u


def tower_step_tensors(
    ts: dict[str, Tensor],
    levels: Sequence[Level],
    update_dot: Tensor,
    lr: float | Tensor,
    search_dot: Tensor | None = None,
    search_max_move: float | None = None,
    keep: Tensor | None = None,
) -> Tensor:
    """:func:`tower_step` as tensor operations: no host read (accelerators, compiled steps)."""
    u = ts["log_step"]
    has_prev = ts["step"] > 0 if keep is None else (ts["step"] > 0) & keep
    hyper = _hypergradients(update_dot, u, ts["prev_step"], ts["prev_dir"])
    boost = new_search = None
    exp_avg = ts["exp_avg"]
    if search_dot is not None and search_max_move is not None:
        boost, new_search, exp_avg = _search_boost(ts, search_dot, u)
    max_move = MAX_LOG_CHANGE if search_max_move is None else search_max_move
    # ts["step"]: the number of level updates so far == steps taken before this one
    m, v, direction = _directions(levels, hyper, exp_avg, ts["exp_avg_sq"], ts["step"])
    new_u = _top_down(levels, u, direction, boost, max_move)
    # Commit only where a previous direction existed.
    u.copy_(torch.where(has_prev, new_u, u))
    ts["exp_avg"].copy_(torch.where(has_prev, m, ts["exp_avg"]))
    ts["exp_avg_sq"].copy_(torch.where(has_prev, v, ts["exp_avg_sq"]))
    ts["prev_dir"].copy_(torch.where(has_prev, direction, ts["prev_dir"]))
    ts["hypergrad"].copy_(torch.where(has_prev, hyper, ts["hypergrad"]))
    if new_search is not None:
        ts["search"].copy_(torch.where(has_prev, new_search, ts["search"]))
    prev_step = ts["prev_step"]
    if keep is None:
        prev_step.copy_(u.exp())
        prev_step[:, 0] *= lr
    else:  # a masked step keeps the step sizes it had (lr may have moved since)
        new_step = u.exp()
        new_step[:, 0] *= lr
        prev_step.copy_(torch.where(keep, new_step, prev_step))
    return prev_step[:, 0].clone()
