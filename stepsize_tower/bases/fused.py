"""Shared plumbing for torch's fused update kernels (one kernel call per distinct step size)."""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from typing import Any

import torch
from torch import Tensor

_FUSED_DEVICES = ("cpu", "cuda")


def is_dense(t: Tensor) -> bool:
    """Whether ``t``'s elements fill its memory span exactly once (any dimension order).

    True for contiguous, transposed and channels-last tensors; False for strided slices and
    expanded (zero-stride) tensors. Size-1 dimensions are ignored, as their stride is arbitrary.
    """
    dims = sorted(((st, s) for s, st in zip(t.shape, t.stride(), strict=True) if s != 1))
    expected = 1
    for stride, size in dims:
        if stride != expected:
            return False
        expected *= size
    return True


def same_layout(tensors: Iterable[Tensor]) -> bool:
    """Whether the tensors are dense and laid out alike (shape and strides): what an
    elementwise fused kernel that walks raw memory needs to pair their elements correctly."""
    listed = list(tensors)
    first = listed[0]
    return is_dense(first) and all(t.shape == first.shape and t.stride() == first.stride() for t in listed[1:])


def fused_applies(group: dict[str, Any], params: list[Tensor], companions: Sequence[Sequence[Tensor]]) -> bool:
    """Whether a fused kernel can update ``params``: one device and dtype, CPU or CUDA floats,
    and every parameter laid out exactly like its gradient and state buffers.

    ``companions[i]`` lists the tensors the kernel reads beside ``params[i]`` (its gradient,
    moments, momentum buffer). torch's fused kernels pair elements by memory position, so a
    strided slice, or a gradient whose layout differs from its parameter's (e.g. assigned by a
    hook), would be updated wrongly: such groups take the reference path instead.
    ``group["fused"]`` set to False turns it off. Under ``torch.compile`` the reference ops are
    traced instead: torch's fused kernels have no fake implementation for a tensor step size,
    and the compiler fuses the elementwise update itself.
    """
    if group.get("fused") is False:
        return False
    if torch.compiler.is_compiling():  # no fake kernel for a tensor step size: inductor fuses the reference ops
        return False
    if not all(p.device.type in _FUSED_DEVICES and p.dtype.is_floating_point for p in params):
        return False
    if len({(p.device, p.dtype) for p in params}) != 1:
        return False
    return all(same_layout([p, *others]) for p, others in zip(params, companions, strict=True))


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
