"""Upper levels of a tower: scalar optimizers that learn the step size below them.

Notation (see ``DEVELOPERS.md``): level 0 is the base optimizer, which moves the
weights with step size ``a_0``. Level ``k >= 1`` learns ``a_{k-1}`` and has its own
step size ``a_k``; the top level ``D``'s step size is fixed.

Every learned step size lives in log space, so it is positive by construction::

    a_0 = lr * exp(u_0)          (lr = group["lr"], owned by any scheduler)
    a_k = exp(u_k)               for 1 <= k < D
    a_D = levels[-1].lr          (fixed)

One step ``s`` of the tower, given the base's dot product ``<g_s, Δ>`` of the new gradient
with the last update ``Δ = a_{0,s-1} d_{0,s-1}`` (horizon 0, one step back) or with the
decaying trail of updates ``D_{s-1} = Σ_j γ^(s-1-j) Δ_j`` (horizon γ > 0)::

    ĥ_1 = -<g_s, Δ>                                    (= dL_s/du_{0,s-1} when γ = 0)
    ĥ_{k+1} = -ĥ_k d_{k,s-1} a_{k,s-1}                 (= dL_s/du_{k,s-1})
    d_{k,s} = ĥ_k                                     (kind "sgd")
    d_{k,s} = m̂_k / (sqrt(v̂_k) + eps)                 (kind "adam", moments of ĥ_k)
    u_{k-1,s} = u_{k-1,s-1} - clip(a_{k,s} d_{k,s}, ±1)   for k = D, D-1, ..., 1 (top-down)

Top-down means level ``k`` uses the step size ``a_{k,s}`` that level ``k+1``
produced in the same step. All state is float64 so that tiny hypergradients
(step sizes of 1e-7 and below) neither underflow nor vanish under ``eps``.

Growth search (opt-in, :mod:`stepsize_tower.search`): while it goes on, level 1's move on
``u_0`` is boosted. Two paths compute the same float64 math: tensor operations here (on
accelerators and under ``torch.compile``: no host read, no guards on floats) and Python
floats in :mod:`stepsize_tower.levels_host` (a tower's few scalars on the CPU cost more in
per-op overhead than in arithmetic). ``tests/test_level_math_paths.py`` keeps them equal;
change both together.
"""

from __future__ import annotations

from collections.abc import Sequence

import torch
from torch import Tensor

from .host_path import tower_step_host
from .spec import (
    HOST_MATH_MAX,
    HYPERGRAD_BOUND,
    LEVEL_KINDS,
    LOG_STEP_BOUND,
    MAX_LOG_CHANGE,
    STATE_DTYPE,
    Level,
    current_step_sizes,
    init_tower_state,
)
from .tensor_path import moment_direction, tower_step_tensors

__all__ = [
    "HOST_MATH_MAX",
    "HYPERGRAD_BOUND",
    "LEVEL_KINDS",
    "LOG_STEP_BOUND",
    "MAX_LOG_CHANGE",
    "STATE_DTYPE",
    "Level",
    "current_step_sizes",
    "init_tower_state",
    "moment_direction",
    "tower_step",
]


def tower_step(
    ts: dict[str, Tensor],
    levels: Sequence[Level],
    update_dot: Tensor,
    lr: float | Tensor,
    search_dot: Tensor | None = None,
    search_max_move: float | None = None,
    keep: Tensor | None = None,
) -> Tensor:
    """Update every level in place from ``<g_s, Δ>`` and return the new ``a_0`` [U].

    ``update_dot`` has shape [U]: the new gradient against the last update (or the trail).
    On the first step (``ts["step"] == 0``) there is no previous direction: the levels stay
    as they are and ``a_0 = lr * exp(u_0)``. Call it only for steps that are taken (finite
    gradients, no retreat). With ``search_max_move`` and ``search_dot`` (the search's test
    margin [U], :func:`stepsize_tower.search.keeps_searching`), units still in the growth
    search grow faster; a state without ``"search"`` has no search. With ``keep`` (a 0-dim
    bool tensor), the update is masked: where it is False nothing changes and the last
    ``a_0`` is returned (no host read on the tensor path).
    """
    u = ts["log_step"]
    if not levels:
        raise ValueError("tower_step needs at least one level; a depth-0 optimizer has nothing to learn")
    if search_max_move is None or search_dot is None or "search" not in ts:
        search_max_move = search_dot = None
    # Compiled steps keep tensors: no graph breaks, no guards on float values.
    if u.device.type == "cpu" and u.numel() <= HOST_MATH_MAX and not torch.compiler.is_compiling():
        return tower_step_host(ts, levels, update_dot, lr, search_dot, search_max_move, keep)
    return tower_step_tensors(ts, levels, update_dot, lr, search_dot, search_max_move, keep)
