"""Masked updates: a step that may be skipped, decided on the device (no host read).

``skip`` is a 0-dim bool tensor. Where it is True the update changes nothing: torch's fused
kernels take it as their ``found_inf`` argument; elsewhere each tensor's update is followed by
``x <- where(skip, x_before, x_after)`` over the weight and every state tensor, one tensor at
a time (so the transient copy is one tensor's weight and state). Where it is False the result
is bitwise the unmasked update: ``where`` selects it unchanged.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

import torch
from torch import Tensor

__all__ = ["found_inf", "per_tensor"]


def found_inf(skip: Tensor | None) -> dict[str, Tensor]:
    """The keyword torch's fused kernels skip on (``found_inf=1.0``), or nothing."""
    return {} if skip is None else {"found_inf": skip.to(torch.float32)}


def per_tensor(
    skip: Tensor | None,
    params: Sequence[Tensor],
    states: Sequence[dict[str, Any]],
    update_one: Callable[[int], None],
) -> None:
    """Run ``update_one(i)`` for every tensor ``i``, undone where ``skip`` holds (if given)."""
    if skip is None:
        for i in range(len(params)):
            update_one(i)
        return
    for i, (p, st) in enumerate(zip(params, states, strict=True)):
        weight_before = p.clone()
        state_before = {k: v.clone() for k, v in st.items() if isinstance(v, Tensor)}
        update_one(i)
        p.copy_(torch.where(skip, weight_before, p))
        for key in list(st):
            value = st[key]
            if not isinstance(value, Tensor):
                continue
            if key in state_before:
                value.copy_(torch.where(skip, state_before[key], value))
            else:  # created by this update: zeros where skipped (removing it would need a read)
                st[key] = torch.where(skip, torch.zeros_like(value), value)
