r"""The trail's horizon at a step: fixed, or growing with the steps the run has taken.

The level-0 hypergradient is taken against a trail of recent updates kept as the moving
average (:mod:`stepsize_tower.trail`)

.. math::
    E_s = (1 - \omega_s) E_{s-1} + \omega_s \Delta_s, \qquad
    h_s = \langle g_s, E_{s-1} \rangle / \omega_s ,

so :math:`E/\omega` is the sum of about :math:`n = 1/\omega` recent updates.

* ``horizon=γ`` (a float): :math:`\omega_s = 1 - \gamma` at every step, a trail of about
  :math:`1/(1-\gamma)` updates; 0 is the last update alone.
* ``horizon=(γ_0, γ_1)`` (a pair, :math:`0 < \gamma_0 \le \gamma_1 < 1`): the trail spans as
  many updates as the run has taken, from :math:`1/(1-\gamma_0)` up to :math:`1/(1-\gamma_1)`,

  .. math::
      \omega_s = \min\bigl(1 - \gamma_0,\ \max(1 - \gamma_1,\ 1/s)\bigr),

  with :math:`s` the steps taken before this one. The greedy hypergradient prefers the step size
  that is best over its horizon (short-horizon bias: too small under noise), and an optimizer
  does not know how long the run will be; a run that has taken :math:`s` steps is taken to go
  on for about as long again. The first :math:`1/(1-\gamma_0)` steps are those of the fixed
  horizon :math:`\gamma_0`, bit for bit (a short trail lets a step size typed far too small
  grow quickly).

On the CPU's read path :math:`s` is the host's exact count and :math:`\omega_s` a Python float
(the native kernels take it; ``torch.compile`` treats it as a dynamic input, no recompile); on
the masked path (accelerators), where the host stops following the count, it is computed from
the step-count tensor, so no step reads the device.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any, TypeAlias

import torch
from torch import Tensor

__all__ = ["Horizon", "check", "is_growing", "longest", "weight_at", "weight_tensor"]

#: A fixed decay γ, or the pair (γ_0, γ_1) of a trail growing with the run.
Horizon: TypeAlias = float | tuple[float, float]


def is_growing(horizon: Any) -> bool:
    """Whether ``horizon`` is a pair (a trail that grows with the steps taken)."""
    return isinstance(horizon, (tuple, list))


def longest(horizon: Any) -> float:
    """The largest decay the trail reaches (the fixed γ, or γ_1); 0 means no trail."""
    return float(horizon[1]) if is_growing(horizon) else float(horizon)


def weight_at(horizon: Any, steps_taken: int) -> float:
    """:math:`\\omega_s` for ``steps_taken`` steps already taken (host arithmetic, float64)."""
    if not is_growing(horizon):
        return 1.0 - float(horizon)
    shortest, longest_ = _weight_bounds(horizon)
    if steps_taken <= 0:
        return shortest
    return min(shortest, max(longest_, 1.0 / steps_taken))


def weight_tensor(horizon: Sequence[float], step: Tensor) -> Tensor:
    """:math:`\\omega_s` of a growing horizon from the step-count tensor (no host read); the same
    float64 value as :func:`weight_at` for the same count."""
    shortest, longest_ = _weight_bounds(horizon)
    inverse = torch.reciprocal(step.to(torch.float64))  # 1/0 = inf: clamped to the shortest trail
    return inverse.clamp(min=longest_, max=shortest)


def _weight_bounds(horizon: Sequence[float]) -> tuple[float, float]:
    """The largest and smallest weight of a growing horizon: ``(1 - γ_0, 1 - γ_1)``."""
    return 1.0 - float(horizon[0]), 1.0 - float(horizon[1])


def check(horizon: Any) -> str | None:
    """An error message for an invalid ``horizon``, else None."""
    if is_growing(horizon):
        ok = len(horizon) == 2 and all(_is_number(x) for x in horizon) and 0.0 < horizon[0] <= horizon[1] < 1.0
        if not ok:
            return (
                f"Invalid horizon: {horizon!r}; a growing horizon is a pair (start, end) with "
                "0 < start <= end < 1, e.g. (0.99, 0.999)"
            )
        return None
    if not (_is_number(horizon) and 0.0 <= horizon < 1.0):
        return (
            f"Invalid horizon: {horizon!r}; expected 0 <= horizon < 1 (0 = one step back) or a pair "
            "(start, end) with 0 < start <= end < 1"
        )
    return None


def _is_number(x: Any) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool)
