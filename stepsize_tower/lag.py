r"""The lagged trail hypergradient (option ``lagged``; TowerAdam's default): one pass over memory less.

The exact step of level 0 reads every gradient and trail once for

.. math::
    h_s = \langle \tilde g_s, E_{s-1} \rangle, \qquad \tilde g_s = \pm g_s\;(+\,\lambda w),

decides the step size :math:`a_s` from :math:`h_s / \omega_s`, then updates: two passes. The
lagged step takes :math:`h_s` inside step :math:`s`'s update pass instead (the base's one-pass
kernel returns it; elsewhere the one read pass of the exact step, which then also tells the
finiteness) and keeps :math:`h_s / \omega_s` in the tower state (:data:`LAG_KEY`, per unit);
step :math:`s+1` learns from it in place of :math:`h_{s+1} / \omega_{s+1}`. The step size thus
reacts one step later: within the benchmarks' noise for Adam, a small measured cost for SGD,
whose default stays exact (experiments/README.md, session 14).

It is the method on every path (native kernel, compiled kernels, the reference ops, masked
steps, sharded groups), so paths agree up to rounding and a resumed run continues bit for bit:

* the start-up window and a growth search stay exact (their tests read the current gradient
  anyway); the value kept by the last of their steps serves the first settled step;
* a skipped step keeps the value as it was; a retreat clears the trail, and the value with it
  (0: the exact hypergradient against a cleared trail);
* where the update pass takes it, the lagged value no longer contains the current gradient, so a
  settled step reads the gradients once more for their finiteness (4 bytes per float32
  parameter; SGD's blow-up guard reads the largest entry, which tells the same);
* a fall of the step size that forgets larger steps (:func:`stepsize_tower.trail.forget_larger_steps`)
  scales a value read before the update as it scales the trail;
* on a sharded group the update pass's partial sums are all-reduced at once (one collective of
  one value, no host read), so every rank keeps the same value, as a distributed checkpoint
  expects of a group's state (it saves one rank's copy for all).
"""

from __future__ import annotations

from typing import Any

import torch
from torch import Tensor

__all__ = ["LAG_KEY", "keep", "restart", "wanted"]

#: The tower state's entry of the kept value, per unit (float64 [units]).
LAG_KEY = "lag_dot"


def wanted(group: dict[str, Any], horizon: float) -> bool:
    """Whether this group's update pass takes the hypergradient for the next step."""
    return bool(group.get("lagged")) and bool(group["levels"]) and horizon > 0


def keep(ts: dict[str, Tensor], h: Tensor, weight: float | Tensor, skip: Tensor | None = None) -> None:
    """Keep ``h / weight`` ([units] float64) for the next step; unchanged where ``skip`` holds."""
    value = (h.to(dtype=torch.float64, device=ts["step"].device) / weight).reshape(-1)
    kept = ts.get(LAG_KEY)
    if kept is None or kept.shape != value.shape:  # the first value (a skipped first one keeps 0)
        kept = ts[LAG_KEY] = torch.zeros_like(value)
    kept.copy_(value if skip is None else torch.where(skip, kept, value))


def restart(ts: dict[str, Tensor], fires: Tensor | None = None) -> None:
    """After a retreat (where the 0-dim bool ``fires`` holds): the cleared trail's value, 0."""
    kept = ts.get(LAG_KEY)
    if kept is None:
        return
    if fires is None:
        kept.zero_()
    else:
        kept.copy_(torch.where(fires, torch.zeros_like(kept), kept))
