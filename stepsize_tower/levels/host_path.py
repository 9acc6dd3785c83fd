""":func:`~stepsize_tower.levels.tower_step` for state on the CPU, in Python floats.

The same float64 math as :mod:`.tensor_path`, not as tensor ops: a tower's few scalars cost
more in per-op overhead than in arithmetic. Agrees with the tensor path to rounding
(``exp``/``log``/``pow`` may differ in the last bit); ``tests/test_level_math_paths.py``.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import torch
from torch import Tensor

from ..search import LOG_SPEEDUP, MAX_LOG_BOOST, searched_move
from .spec import HYPERGRAD_BOUND, LOG_STEP_BOUND, MAX_LOG_CHANGE, STATE_DTYPE, Level

__all__ = ["tower_step_host"]


@dataclass
class _Unit:
    """One unit's rows of the tower state, as Python floats (changed in place)."""

    u: list[float]
    prev_step: list[float]
    prev_dir: list[float]
    exp_avg: list[float]
    exp_avg_sq: list[float]


def _clip(x: float, bound: float) -> float:
    return min(max(x, -bound), bound)


def _hypergradients(h1: float, unit: _Unit, depth: int) -> list[float]:
    hyper, scale = [], -h1
    for k in range(depth):
        if k:
            scale *= -unit.prev_dir[k - 1] * unit.prev_step[k]
        hyper.append(_clip(scale, HYPERGRAD_BOUND))
    return hyper


def _directions(levels: Sequence[Level], hyper: list[float], unit: _Unit, count: float) -> list[float]:
    """Each level's direction; updates the unit's moments."""
    direction = []
    for k, lv in enumerate(levels):
        h, (b1, b2) = hyper[k], lv.betas
        m = unit.exp_avg[k] + (1 - b1) * (h - unit.exp_avg[k])
        v = b2 * unit.exp_avg_sq[k] + (1 - b2) * h * h
        unit.exp_avg[k], unit.exp_avg_sq[k] = m, v
        if lv.kind == "adam":
            d = (m / (1 - b1**count)) / (math.sqrt(v / (1 - b2**count)) + lv.eps)
            lowers = d > 0  # u_{k-1} moves by -a_k d: a positive direction lowers the step size
            direction.append(d * min(d, 1.0) ** lv.consistency if lv.consistency and lowers else d)
        else:
            direction.append(h)
    return direction


def _top_down(levels: Sequence[Level], unit: _Unit, direction: list[float], boost: float, max_move: float) -> None:
    step_k = levels[-1].lr
    for k in range(len(levels), 0, -1):
        change = _clip(step_k * direction[k - 1], MAX_LOG_CHANGE)
        if change > 0:
            change *= levels[k - 1].shrink
        if k == 1:
            change = searched_move(change, boost, max_move)
        unit.u[k - 1] = _clip(unit.u[k - 1] - change, LOG_STEP_BOUND)
        step_k = math.exp(unit.u[k - 1])
    unit.prev_dir[:] = direction


def _search_boost(searched: float, search_dot: float, unit: _Unit) -> tuple[float, float]:
    """The boost on level 1's move and the new search counter (level 1's first moment restarts at the end)."""
    if searched < 0:
        return 1.0, searched
    if search_dot > 0:
        return math.exp(min(searched * LOG_SPEEDUP, MAX_LOG_BOOST)), searched + 1
    unit.exp_avg[0] = 0.0
    return 1.0, -1.0


def tower_step_host(
    ts: dict[str, Tensor],
    levels: Sequence[Level],
    update_dot: Tensor,
    lr: float | Tensor,
    search_dot: Tensor | None = None,
    search_max_move: float | None = None,
    keep: Tensor | None = None,
) -> Tensor:
    """:func:`~stepsize_tower.levels.tower_step` in Python floats (arguments and result alike)."""
    if keep is not None and not bool(keep):  # a masked step not taken (a CPU tensor: no device read)
        return ts["prev_step"][:, 0].clone()
    keys = ("log_step", "prev_step", "prev_dir", "exp_avg", "exp_avg_sq")
    units = [_Unit(*rows) for rows in zip(*(ts[k].tolist() for k in keys), strict=True)]
    count = float(ts["step"])
    searching = search_dot is not None and search_max_move is not None
    searched = ts["search"].tolist() if searching else []
    search_dots = search_dot.tolist() if search_dot is not None else []
    max_move = MAX_LOG_CHANGE if search_max_move is None else search_max_move
    if count > 0:
        hyper_all = []
        for i, (unit, h1) in enumerate(zip(units, update_dot.tolist(), strict=True)):
            hyper = _hypergradients(h1, unit, len(levels))
            boost = 1.0
            if searching:
                boost, searched[i] = _search_boost(searched[i], search_dots[i], unit)
            _top_down(levels, unit, _directions(levels, hyper, unit, count), boost, max_move)
            hyper_all.append(hyper)
        for key in ("log_step", "exp_avg", "exp_avg_sq", "prev_dir"):
            _store(ts[key], [getattr(unit, "u" if key == "log_step" else key) for unit in units])
        _store(ts["hypergrad"], hyper_all)
        if searching:
            _store(ts["search"], [searched])
    lr_value = float(lr)
    steps = [[math.exp(x) for x in unit.u] for unit in units]
    for row in steps:
        row[0] *= lr_value
    _store(ts["prev_step"], steps)
    return ts["prev_step"][:, 0].clone()


def _store(t: Tensor, rows: list[list[float]]) -> None:
    """Write Python floats ``rows`` [U][D] (or [1][U] for a [U] tensor) into state tensor ``t``."""
    if t.numel() == 1:
        t.fill_(rows[0][0])
    else:
        t.copy_(torch.tensor(rows, dtype=STATE_DTYPE).reshape(t.shape))
