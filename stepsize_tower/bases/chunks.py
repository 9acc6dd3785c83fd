"""Helpers for the read-only probe pass: flat views, chunking and float dot products."""

from __future__ import annotations

from collections.abc import Iterator

import torch
from torch import Tensor

#: Elements per chunk of the probe pass: temporaries stay in cache (1 MiB in float32).
CHUNK = 1 << 18

_LOW_PRECISION = (torch.float16, torch.bfloat16)


def flat(t: Tensor) -> Tensor:
    """A 1-D view (or copy, for non-contiguous tensors), upcast from 16-bit floats."""
    out = t.reshape(-1)
    return out.float() if out.dtype in _LOW_PRECISION else out


def chunks(*tensors: Tensor, size: int = CHUNK) -> Iterator[tuple[Tensor, ...]]:
    """Yield matching slices of equally long flat tensors."""
    n = tensors[0].numel()
    for start in range(0, n, size):
        yield tuple(t[start : start + size] for t in tensors)


def dot(a: Tensor, b: Tensor) -> Tensor:
    """``<a, b>`` as a 0-dim float64 tensor (accumulated in the inputs' precision)."""
    return torch.dot(a, b).double()
