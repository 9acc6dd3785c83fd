r"""Under a schedule that anneals ``group["lr"]``, level 1 holds back its own lowering moves.

The tower treats ``group["lr"]`` as an outer factor on its learned step size, so a user keeps
their warm-up + cosine schedule and drops the lr search. Under gradient noise the greedy
hypergradient asks for smaller steps even at a good rate (short-horizon bias: it anneals);
with a schedule that anneals too, the two decays compound. So on every step whose ``lr`` is
below its largest value of the taken steps (the schedule is annealing), level 1 makes only a
share :math:`\kappa` of each move that lowers :math:`u_0` (the group's ``schedule_hold_back``,
default :data:`stepsize_tower.options.DEFAULT_SCHEDULE_HOLD_BACK`; 1 turns it off):

.. math::
    u_0 \leftarrow u_0 - \begin{cases} \kappa \cdot c & c > 0 \\ c & c \le 0 \end{cases}
    \qquad \text{while } \texttt{lr}_s < \max_{j < s} \texttt{lr}_j

(:attr:`stepsize_tower.levels.Level.shrink` on top of the level's own). Raising moves, runs
at a constant ``lr`` and the rising steps of a warm-up are unchanged. Measured on the field
benchmark under 5 % warm-up + cosine: experiments/README.md, "The schedule owns the decay".

The largest ``lr`` so far is the host clock's (:class:`stepsize_tower.host_clock.Clock`); once a
schedule has lowered ``lr`` it is kept in the tower state as well (:data:`PEAK_LR_KEY`, made
then, never before), so a resumed or copied optimizer anneals on the same steps.
"""

from __future__ import annotations

import dataclasses
import functools

import torch
from torch import Tensor

from .host_clock import PEAK_LR_KEY, Clock
from .levels import Level

__all__ = ["PEAK_LR_KEY", "keep_peak", "levels_while_annealing"]


def levels_while_annealing(levels: tuple[Level, ...], share: float) -> tuple[Level, ...]:
    """``levels`` with level 1's ``shrink`` multiplied by ``share`` (the group's ``schedule_hold_back``)."""
    return levels if share == 1 else _held_back(levels, share)


@functools.lru_cache(maxsize=64)
def _held_back(levels: tuple[Level, ...], factor: float) -> tuple[Level, ...]:
    """Made once per stack of levels (and factor), not on every annealing step."""
    if not levels:
        return levels
    return (dataclasses.replace(levels[0], shrink=levels[0].shrink * factor), *levels[1:])


def keep_peak(ts: dict[str, Tensor], clock: Clock) -> None:
    """Store the clock's largest ``lr`` in the tower state when it is new (no read)."""
    if clock.peak_kept != clock.peak_lr:
        ts[PEAK_LR_KEY] = torch.tensor(clock.peak_lr, dtype=torch.float64, device=ts["step"].device)
        clock.peak_kept = clock.peak_lr
