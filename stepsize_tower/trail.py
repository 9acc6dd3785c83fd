"""The trail: a moving average ``E`` of the recent updates, the level-0 hypergradient's reference.

With ``horizon = γ > 0`` the hypergradient of ``log a_0`` is taken against the decaying sum of
recent updates ``D_{s-1} = Σ_j γ^(s-1-j) Δ_j`` instead of the last update alone; it is kept
as its moving average ``E = (1 - γ) D``, one parameter-sized buffer per tensor (state key
``update_ema``), and updated around the base's update::

    E <- (1 - ω) E + ω Δ,   ω = 1 - γ,   Δ = w_before - w_after

(with a growing horizon ω changes with the steps taken: :mod:`stepsize_tower.horizon`).

A retreat clears it (it held the unstable steps). Once the learned factor ``exp(u_0)`` has
fallen far below its peak, each further fall also scales ``E`` down by the same factor
(:func:`forget_larger_steps`), so steps taken at rates many times the current one stop
deciding the hypergradient.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any

import torch
from torch import Tensor

from .bases import chunks

__all__ = [
    "FORGET_BELOW_PEAK",
    "PEAK_KEY",
    "TRAIL_KEY",
    "clear",
    "clear_where",
    "dots",
    "ensure",
    "fold_update",
    "forget_larger_steps",
    "has_trail",
]

#: Trail dtypes in which a tensor-valued weight rounds exactly like the float one.
_EXACT_DTYPES = (torch.float32, torch.float64)

#: Per-parameter state key of the trail (the name checkpoints carry).
TRAIL_KEY = "update_ema"

#: Tower-state key of the largest learned log factor ``u_0`` of the taken steps, per unit.
PEAK_KEY = "peak_log_step"

#: Below ``1 / FORGET_BELOW_PEAK`` of its peak factor, a falling step size scales the trail too.
#: Measured (experiments/README.md, "Forgetting steps taken at far larger rates"): Adam on the
#: noisy quadratic model typed 1000x too small overshot to 6x the best rate, and a trail of
#: horizon 0.999 that kept those steps drove the rate to 1e-5x of it; with 8 it ends at 0.8x.
#: A transformer LM whose rate falls less than 8x from its peak is unchanged (bitwise).
FORGET_BELOW_PEAK = 8.0


def has_trail(states: list[dict[str, Any]]) -> bool:
    """Whether every tensor already has its trail (none exists before the first taken step)."""
    return all(TRAIL_KEY in st for st in states)


def ensure(params: list[Tensor], states: list[dict[str, Any]]) -> list[Tensor]:
    """Each tensor's trail, created as zeros where missing."""
    for p, st in zip(params, states, strict=True):
        if TRAIL_KEY not in st:
            st[TRAIL_KEY] = torch.zeros_like(p, memory_format=torch.preserve_format)
    return [st[TRAIL_KEY] for st in states]


def dots(
    loss_grad: Callable[[Tensor, Tensor], Tensor],
    params: list[Tensor],
    grads: list[Tensor],
    states: list[dict[str, Any]],
    zero: Tensor,
) -> list[Tensor]:
    """``<g_s, E>`` per tensor, ``g_s = loss_grad(p, grad)``, in the tensors' precision (``zero`` without a trail)."""
    return [
        torch.dot(chunks.flat(loss_grad(p, g)), chunks.flat(st[TRAIL_KEY])) if TRAIL_KEY in st else zero
        for p, g, st in zip(params, grads, states, strict=True)
    ]


def fold_update(
    trails: list[Tensor],
    params: list[Tensor],
    weight: float | Tensor,
    move: Callable[[], None],
    skip: Tensor | None = None,
) -> None:
    """Run ``move`` and fold the update it makes into ``E <- (1 - weight) E + weight (w_before - w_after)``.

    Two passes: ``E <- lerp(E, w_before, weight)``, then ``E <- E - weight w_after``. With
    ``skip`` (a 0-dim bool tensor: ``move`` changes nothing where it holds) the weight is the
    tensor ``weight * (1 - skip)``, so a skipped step leaves ``E`` exactly as it was, with no
    host read; for float32/float64 tensors the taken step is bitwise the same as with the
    float weight. 16-bit trails are restored with ``where`` instead. With ``skip``, ``weight``
    may also be a 0-dim tensor (a growing horizon's weight on masked steps, not read).
    """
    if skip is None:
        assert not isinstance(weight, Tensor), "a tensor weight comes with masked steps, which pass skip"
        torch._foreach_lerp_(trails, params, weight)
        move()
        torch._foreach_add_(trails, params, alpha=-weight)
    elif all(t.dtype in _EXACT_DTYPES for t in trails):
        kept = {dtype: ((~skip).to(dtype) * weight).to(dtype) for dtype in {t.dtype for t in trails}}  # one per dtype
        torch._foreach_lerp_(trails, params, [kept[t.dtype] for t in trails])
        move()
        dropped = {dtype: -k for dtype, k in kept.items()}
        torch._foreach_addcmul_(trails, params, [dropped[t.dtype] for t in trails])
    else:
        if isinstance(weight, Tensor):  # 16-bit trails round like the float weight: one read (rare)
            weight = float(weight)
        before = [t.clone() for t in trails]
        fold_update(trails, params, weight, move)
        for t, old in zip(trails, before, strict=True):
            t.copy_(torch.where(skip, old, t))


def clear(state: dict[str, Any]) -> None:
    """Start the tensor's trail afresh (after a retreat)."""
    if TRAIL_KEY in state:
        state[TRAIL_KEY].zero_()


def clear_where(state: dict[str, Any], fires: Tensor) -> None:
    """:func:`clear` where the 0-dim bool tensor ``fires`` holds (no host read; ``E * 1 = E`` exactly)."""
    if TRAIL_KEY in state:
        state[TRAIL_KEY].mul_((~fires).to(state[TRAIL_KEY].dtype))


def forget_larger_steps(
    ts: dict[str, Tensor],
    u_before: Tensor,
    states: list[dict[str, Any]],
    unit_of: list[int],
    keep: Tensor | None = None,
    active: bool = True,
    also: Tensor | None = None,
) -> None:
    r"""Scale the trails of units whose learned factor fell, once it is far below its peak.

    With :math:`u = u_{0,s}`, :math:`u^- = u_{0,s-1}` (``u_before``, [U]) and :math:`\hat u`
    the largest :math:`u_0` of the taken steps (state ``PEAK_KEY``, [U]):

    .. math::
        E \leftarrow r\,E, \qquad r = \begin{cases} e^{u - u^-} & u < u^- \text{ and }
        u < \hat u - \log(\text{FORGET\_BELOW\_PEAK}) \\ 1 & \text{otherwise} \end{cases}

    so the trail holds the recent updates as if they had been made at the current rate. With
    ``keep`` (a 0-dim bool tensor) nothing changes where it is False, and nothing is read (the
    trails are multiplied by ``r``, exactly 1 where nothing fires); without it, one read decides
    whether any unit fires. With ``active=False`` (the start-up window, whose steps read at most
    once) only the peak is kept. ``also`` ([U], a dot product against the trails taken before
    this step's update, :mod:`stepsize_tower.lag`) is scaled alike, in place.
    """
    u = ts["log_step"][:, 0]
    peak = ts.get(PEAK_KEY)
    if peak is None:  # a new tower, or one saved before the peak was kept
        peak = ts[PEAK_KEY] = torch.maximum(u_before, u).clone()
    elif keep is None:
        torch.maximum(peak, u, out=peak)
    else:
        peak.copy_(torch.where(keep, torch.maximum(peak, u), peak))
    if not active:
        return
    fires = (u < u_before) & (u < peak - math.log(FORGET_BELOW_PEAK))
    if keep is None:
        if not bool(fires.any()):  # the read path: skip the pass when nothing fires
            return
    else:
        fires = fires & keep
    factor = torch.where(fires, (u - u_before).exp(), torch.ones_like(u))
    if also is not None:
        also.mul_(factor.to(also))
    pairs = [(st[TRAIL_KEY], unit) for st, unit in zip(states, unit_of, strict=True) if TRAIL_KEY in st]
    if pairs:
        torch._foreach_mul_([t for t, _ in pairs], [factor[unit].to(t.dtype) for t, unit in pairs])
