"""Per-parameter buffers the tower keeps beside the base's own state."""

from __future__ import annotations

from typing import Any

import torch
from torch import Tensor


def keep(state: dict[str, Any], key: str, value: Tensor, dtype: torch.dtype | None = None) -> None:
    """``state[key] = value`` into a persistent buffer (allocated on first use, in ``dtype`` if given)."""
    buf = state.get(key)
    if buf is None:
        fresh = value.detach().clone(memory_format=torch.preserve_format)
        state[key] = fresh if dtype is None else fresh.to(dtype)
    else:
        buf.copy_(value)
