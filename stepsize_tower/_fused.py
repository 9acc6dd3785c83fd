"""Shared plumbing for torch's fused update kernels (one kernel call per distinct step size)."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import torch
from torch import Tensor

_FUSED_DEVICES = ("cpu", "cuda")


def fused_applies(group: dict[str, Any], params: list[Tensor]) -> bool:
    """Whether a fused kernel can update ``params``: one device and dtype, CPU or CUDA floats.

    ``group["fused"]`` set to False turns it off.
    """
    if group.get("fused") is False:
        return False
    return all(p.device.type in _FUSED_DEVICES and p.dtype.is_floating_point for p in params) and (
        len({(p.device, p.dtype) for p in params}) == 1
    )


def by_step_size(step_sizes: Sequence[Tensor | float]) -> list[tuple[Tensor, list[int]]]:
    """Indices grouped by step-size object, each with the step size as a float64 tensor.

    The engine hands one tensor per unit (per group by default), so this is one bucket per unit.
    """
    buckets: dict[int, list[int]] = {}
    for i, a in enumerate(step_sizes):
        buckets.setdefault(id(a), []).append(i)
    out = []
    for idx in buckets.values():
        a = step_sizes[idx[0]]
        out.append((a if isinstance(a, Tensor) else torch.tensor(float(a), dtype=torch.float64), idx))
    return out
