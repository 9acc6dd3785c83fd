"""Which parameter groups reduce across ranks, and a one-time check that unsharded ranks agree.

A group's dot products are complete only if this rank holds all of the group. Under
``DistributedDataParallel`` every rank holds the same parameters and bitwise the same
(all-reduced) gradients, so each rank learns the same step sizes alone. Under
``ZeroRedundancyOptimizer`` or FSDP2 each rank holds a part, and without the reduction
(``sharded=True``) every rank learns its own step size from a partial sum and the ranks drift
apart (measured, 2 gloo ranks, 30 steps: 5.15e-4 vs 6.33e-4; one process 5.37e-4).

``sharded`` is a per-group option with three values:

* ``True``: reduce (see :mod:`stepsize_tower.tower`).
* ``None`` (default), detect: FSDP2 parameters are DTensors sharded over a device mesh, which
  says by itself that every rank holds a part, so such a group reduces without being asked
  (:func:`auto_sharded`). Plain tensors say nothing: there, once per optimizer, at its first
  step while ``torch.distributed`` is initialized, :func:`check_once` compares what each rank
  holds with ONE all-reduce of 6 numbers and warns if the ranks differ.
* ``False``: the ranks hold the same parameters, or train separate models on purpose: no
  collective, no check.

Why warn rather than reduce on a mismatch: ranks that hold different plain tensors may be
shards of one model (ZeRO) or separate models (pipeline stages, independent runs sharing a
process group); only the first wants the reduction, and a reduction switched on where the
ranks' groups do not line up would hang or mix unrelated models. The user knows which it is.

The check assumes that every rank calls ``step()`` (DDP, ZeRO and FSDP2 all do); where only
some ranks step an optimizer while a process group is up, pass ``sharded=False``. It runs
once per optimizer object: a copy (``copy.deepcopy``, unpickling) checks again at its first
step, as does a fresh optimizer that loads a checkpoint.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from typing import Any

import torch
from torch import Tensor
from torch import distributed as dist

__all__ = ["auto_sharded", "check_once", "fingerprint", "reduces_across_ranks"]

#: Attribute set on an optimizer once its ranks were compared (never twice per object).
_CHECKED = "_tower_ranks_checked"

#: The shape code is a polynomial hash modulo this prime: below 2**31, exact in float64 sums.
_MODULUS = 2_147_483_647
_BASE = 1_000_003


def _distributed() -> bool:
    return dist.is_available() and dist.is_initialized()


def _is_dtensor(t: Any) -> bool:
    return type(t).__name__ == "DTensor" and hasattr(t, "to_local")


def _supported_sharding(p: Any) -> bool:
    """Sharded along exactly one mesh dimension and replicated along any other (FSDP2, HSDP)."""
    placements = tuple(p.placements)
    shard_dims = [i for i, pl in enumerate(placements) if pl.is_shard()]
    return len(shard_dims) == 1 and all(pl.is_replicate() for i, pl in enumerate(placements) if i != shard_dims[0])


def auto_sharded(group: dict[str, Any]) -> bool:
    """Whether a ``sharded=None`` group reduces by itself: all its parameters are DTensors
    sharded along one mesh dimension, and it learns one step size per group."""
    params = group["params"]
    return (
        group.get("sharded") is None
        and group.get("granularity", "group") == "group"
        and bool(params)
        and all(_is_dtensor(p) and _supported_sharding(p) for p in params)
    )


def reduces_across_ranks(group: dict[str, Any]) -> bool:
    """Whether the group's dot products are all-reduced this step (a process group is up and
    the group is ``sharded=True``, or ``None`` with FSDP2 parameters)."""
    return _distributed() and (group.get("sharded") is True or auto_sharded(group))


def _checked_here(group: dict[str, Any]) -> bool:
    """An unsharded (``None``) group that learns something: a step size or a hyperparameter."""
    learns = bool(group.get("levels")) or bool(group.get("learn_betas")) or bool(group.get("learn_momentum"))
    return group.get("sharded") is None and learns and not auto_sharded(group)


def _shape_code(group_index: int, shape: Sequence[int]) -> int:
    code = group_index + 1
    for d in (len(shape), *shape):
        code = (code * _BASE + int(d) + 1) % _MODULUS
    return code


def fingerprint(groups: Sequence[dict[str, Any]]) -> list[float]:
    """What this rank holds of the checked groups, as 3 exact numbers: the elements of the
    parameters with a gradient, a hash-like sum of their shapes (with their group's
    position), and the number of checked groups. Equal on every rank under DDP."""
    count = code = n_groups = 0
    for j, group in enumerate(groups):
        if not _checked_here(group):
            continue
        n_groups += 1
        for p in group["params"]:
            if p.grad is not None:
                count += p.numel()
                code = (code + _shape_code(j, p.shape)) % _MODULUS
    return [float(count), float(code), float(n_groups)]


def _device(groups: Sequence[dict[str, Any]]) -> torch.device:
    """A device the default process group can reduce on: a parameter's, else by backend."""
    for group in groups:
        for p in group["params"]:
            return torch.device(p.device)
    return torch.device("cuda", torch.cuda.current_device()) if dist.get_backend() == "nccl" else torch.device("cpu")


def _spread(values: list[float], device: torch.device) -> tuple[Tensor, Tensor]:
    """The smallest and largest of each value over the ranks: one all-reduce (MAX of ``[v, -v]``)."""
    packed = torch.tensor(values + [-v for v in values], dtype=torch.float64, device=device)
    dist.all_reduce(packed, op=dist.ReduceOp.MAX)
    n = len(values)
    return -packed[n:].cpu(), packed[:n].cpu()


def check_once(optimizer: Any) -> None:
    """At the optimizer's first step under ``torch.distributed``: warn if the ranks hold
    different parameters in groups that do not reduce (``sharded=None`` on plain tensors).

    Costs nothing without a process group, with one rank, or once done; otherwise one
    all-reduce of 6 float64 numbers, once per optimizer object.
    """
    if getattr(optimizer, _CHECKED, False) or not _distributed():
        return
    _compare_ranks(optimizer)


@torch.compiler.disable  # type: ignore[misc]  # a collective and a warning: run once, eagerly
def _compare_ranks(optimizer: Any) -> None:
    setattr(optimizer, _CHECKED, True)
    groups = optimizer.param_groups
    if dist.get_world_size() == 1 or not any(_checked_here(g) for g in groups):
        return  # decided from options that every rank shares: no rank calls the collective
    low, high = _spread(fingerprint(groups), _device(groups))
    if torch.equal(low, high):
        return
    name = type(optimizer).__name__
    warnings.warn(
        f"{name}: the ranks hold different parameters (between {int(low[0])} and {int(high[0])} "
        f"elements with gradients per rank), as under ZeroRedundancyOptimizer, but the groups do "
        f"not reduce across ranks: each rank learns its own step size from a partial sum and the "
        f"ranks drift apart. Pass sharded=True, e.g. ZeroRedundancyOptimizer(params, "
        f"optimizer_class={name}, sharded=True, ...); if the ranks train separate models on "
        f"purpose, pass sharded=False to skip this check.",
        RuntimeWarning,
        stacklevel=4,
    )
