r"""The first-step limit of normalized bases: an Adam step larger than the weights themselves.

An Adam-like base moves every weight by about ``a_0`` on its first step (``|m̂ / √v̂| = 1``
there), whatever the gradient. When ``a_0`` is larger than the weights' own typical size,
that step replaces the initialization instead of adjusting it, and the next gradient need not
show it: a saturated model has a flat loss, so the start-up test (a secant slope) sees no
overshoot. So before the first step the step size is limited to

.. math::

    a_0 \leftarrow \min\bigl(a_0,\; c \cdot s\bigr), \qquad
    s = \exp\Bigl(\tfrac{1}{|T|} \sum_{t \in T} \log \operatorname{rms}(w_t)\Bigr),

the geometric mean over the unit's tensors ``T`` with a nonzero root-mean-square entry
(tensors are weighted alike, so a wide embedding table does not set the scale of every
matrix). All-zero tensors carry no scale; a unit with none is not limited. The levels then
take over from the limited value. ``c`` is the ``first_step_limit`` option (default
:data:`stepsize_tower.options.DEFAULT_FIRST_STEP_LIMIT`, measured; ``None`` turns it off).

Sharded groups reduce exactly: under FSDP2 every rank holds a shard of every tensor (the
squares and counts are summed per tensor across ranks), under ZeroRedundancyOptimizer every
tensor lives whole on one rank (the logs and counts are summed).
"""

from __future__ import annotations

from typing import Any

import torch
from torch import Tensor
from torch import distributed as dist

from . import _chunks

__all__ = ["typical_scale"]


def typical_scale(
    params: list[Tensor],
    unit_of: list[int],
    units: int,
    device: torch.device,
    *,
    reduce_group: Any = None,
    sharded: bool = False,
    per_tensor_shards: bool = False,
) -> Tensor:
    """Per unit, the geometric mean of the nonzero per-tensor RMS values (0 where there is none).

    ``params`` are this rank's (local) tensors. With ``sharded``, the values are completed
    across ``reduce_group``: per tensor when every rank holds a shard of every tensor
    (``per_tensor_shards``, FSDP2), else per unit (whole tensors spread over ranks, ZeRO).
    Every rank of a sharded group must call it (it all-reduces). Float64, shape [units].
    """
    dtype = torch.float64
    if params:
        squares = torch.stack([torch.linalg.vector_norm(_chunks.flat(p), dtype=dtype) ** 2 for p in params]).to(device)
    else:
        squares = torch.zeros(0, dtype=dtype, device=device)
    counts = torch.tensor([float(p.numel()) for p in params], dtype=dtype, device=device)
    if sharded and per_tensor_shards:
        packed = torch.cat([squares, counts])
        dist.all_reduce(packed, op=dist.ReduceOp.SUM, group=reduce_group)
        squares, counts = packed[: len(params)], packed[len(params) :]
    rms = (squares / counts.clamp(min=1.0)).sqrt()
    present = rms > 0
    logs = torch.where(present, rms.clamp(min=torch.finfo(dtype).tiny).log(), 0.0)
    index = torch.tensor(unit_of, dtype=torch.long, device=device)
    log_sum = _sum_into_units(logs, index, units)
    count = _sum_into_units(present.to(dtype), index, units)
    if sharded and not per_tensor_shards:
        packed = torch.cat([log_sum, count])
        dist.all_reduce(packed, op=dist.ReduceOp.SUM, group=reduce_group)
        log_sum, count = packed[:units], packed[units:]
    return torch.where(count > 0, (log_sum / count.clamp(min=1.0)).exp(), 0.0)


def _sum_into_units(values: Tensor, index: Tensor, units: int) -> Tensor:
    """``out[u] = Σ_{i: index[i] = u} values[i]``, float64, shape [units].

    Under ``torch.compile`` as a product with a one-hot matrix: inductor's CPU code for a
    float64 ``index_add_`` into a one-element buffer fails to generate (torch 2.13).
    """
    if torch.compiler.is_compiling():
        onehot = (index[:, None] == torch.arange(units, device=index.device)[None, :]).to(values.dtype)
        return values @ onehot
    return torch.zeros(units, dtype=values.dtype, device=values.device).index_add_(0, index, values)
