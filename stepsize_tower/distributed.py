"""Sharded groups (``sharded=True``): DTensor parameters, the sharding ranks, and the one reduction.

Under ``ZeroRedundancyOptimizer`` or FSDP2 each rank holds only part of a group, so every dot
product of a step is a partial sum. Before anything is decided, :func:`reduce_across_ranks`
sums them over the group's sharding ranks (one all-reduce of a packed float64 vector; a second
one takes the maximum of the largest gradient entry when SGD's blow-up guard needs it), so every
rank skips, retreats and learns the same step sizes. The sharding ranks are the default process
group for ZeRO, the mesh's group for FSDP2, and only the sharding dimension's group under HSDP
(a 2-D mesh whose other dimension replicates: replicas hold the same shard)
(:func:`shard_group`). A rank that holds no parameter of the group still takes part (with
zeros). Without an initialized process group nothing here calls a collective.
"""

from __future__ import annotations

from typing import Any

import torch
from torch import Tensor
from torch import distributed as dist

from . import _rank_check

__all__ = [
    "as_param_layout",
    "is_dtensor",
    "local_device",
    "local_parts",
    "local_shard_of",
    "reduce_across_ranks",
    "shard",
    "shard_group",
    "shards_across_ranks",
    "sum_across_ranks",
]


def shards_across_ranks(group: dict[str, Any]) -> bool:
    """Whether the group asks for (``sharded=True``) and can do the cross-rank reduction."""
    return _rank_check.reduces_across_ranks(group)


def local_device(group: dict[str, Any]) -> torch.device:
    """Where a rank that holds none of the group's gradients keeps the group's tower state."""
    if not group["params"]:
        return torch.device("cpu")
    return shard(group["params"][0]).device


def local_parts(params: list[Tensor], sharded: bool, owner: str) -> tuple[list[Tensor], list[Tensor]]:
    """The parameters and gradients as plain tensors: this rank's shard of DTensors (FSDP2).

    The shard shares storage with the DTensor, so updating it in place updates the parameter.
    Per-parameter state is then kept for the shard only, as plain tensors, and the update
    (fused kernels included) runs on plain tensors.
    """
    grads: list[Tensor] = [p.grad for p in params]  # type: ignore[misc]  # callers keep p.grad is not None
    if not any(is_dtensor(p) for p in params):
        return params, grads
    if not sharded:
        raise RuntimeError(
            f"{owner}: the parameters are DTensors (FSDP2) and their dot products are partial sums; "
            "pass sharded=True (with torch.distributed initialized) to reduce them across ranks"
        )
    return [shard(p) for p in params], [shard(g) for g in grads]


def is_dtensor(t: Any) -> bool:
    return type(t).__name__ == "DTensor" and hasattr(t, "to_local")


def shard(t: Tensor) -> Tensor:
    """This rank's part of a DTensor (a view of its storage); any other tensor as it is."""
    return t.to_local() if is_dtensor(t) else t  # type: ignore[attr-defined, no-any-return]


def as_param_layout(value: Any, p: Any) -> Any:
    """A buffer kept for the local shard of DTensor ``p``, as a DTensor laid out like ``p`` (same storage)."""
    if not isinstance(value, Tensor) or is_dtensor(value) or value.dim() == 0 or value.shape != p.to_local().shape:
        return value  # e.g. the step count: the same on every rank
    from torch.distributed.tensor import DTensor

    return DTensor.from_local(value, p.device_mesh, p.placements, run_check=False, shape=p.shape, stride=p.stride())


def local_shard_of(value: Any, p: Any) -> Tensor:
    """This rank's part of a loaded DTensor buffer, laid out like DTensor ``p`` first."""
    if tuple(value.placements) != tuple(p.placements) or value.device_mesh != p.device_mesh:
        value = value.redistribute(p.device_mesh, p.placements)
    return value.to_local()  # type: ignore[no-any-return]


def shard_group(params: list[Tensor]) -> Any:
    """The process group over which a parameter group is sharded; None for the default group.

    FSDP2 parameters are DTensors: on a 1-D mesh the mesh's group; on a 2-D mesh that shards
    along one dimension and replicates along the other (HSDP), the group of the sharding
    dimension only, since replicas hold the same shard and summing over them would count each
    shard once per replica. Plain tensors (ZeroRedundancyOptimizer): the default group.
    """
    for p in params:
        if not is_dtensor(p):
            continue
        mesh, placements = p.device_mesh, p.placements  # type: ignore[attr-defined]
        if mesh.ndim == 1:
            return mesh.get_group()
        shard_dims = [i for i, pl in enumerate(placements) if pl.is_shard()]
        if len(shard_dims) != 1 or not all(pl.is_replicate() for i, pl in enumerate(placements) if i != shard_dims[0]):
            raise RuntimeError(
                f"sharded=True supports DTensor parameters sharded along one mesh dimension (FSDP2, "
                f"HSDP); got placements {tuple(placements)} on a {mesh.ndim}-D mesh"
            )
        return mesh.get_group(shard_dims[0])
    return None


def sum_across_ranks(value: Tensor, group: Any = None) -> Tensor:
    """``value`` summed over the ranks of ``group`` (a float64 copy; one all-reduce, no host read)."""
    total = value.detach().double().clone()
    dist.all_reduce(total, op=dist.ReduceOp.SUM, group=group)
    return total


def reduce_across_ranks(
    count: int, finite: Tensor, sums: list[Tensor | None], gmax: Tensor | None, group: Any = None
) -> tuple[Tensor, Tensor, list[Tensor | None], Tensor | None]:
    """Complete this rank's partial values over ``group`` (default: the default process group).

    ``count`` (parameters with a gradient here), the flag ``not finite`` and every tensor of
    ``sums`` (``None`` entries are passed through) are packed into ONE float64 vector and
    all-reduced with SUM; ``gmax`` (the largest absolute gradient entry), when given, takes a
    second all-reduce with MAX. Returns whether any rank had a gradient and whether every rank
    was finite (0-dim bool tensors: nothing is read back to the host), the summed tensors (in
    their shapes) and the global ``gmax``. Every rank gets bitwise the same values, so every
    rank then takes the same decisions.
    """
    device = finite.device
    present = [s for s in sums if s is not None]
    head = torch.stack([torch.tensor(float(count), dtype=torch.float64, device=device), (~finite).double()])
    packed = torch.cat([head] + [s.reshape(-1).double().to(device) for s in present])
    dist.all_reduce(packed, op=dist.ReduceOp.SUM, group=group)
    out: list[Tensor | None] = []
    offset = 2
    for s in sums:
        if s is None:
            out.append(None)
            continue
        out.append(packed[offset : offset + s.numel()].reshape(s.shape).to(s.device))
        offset += s.numel()
    gmax_all = None
    if gmax is not None:
        gmax_all = gmax.detach().double().reshape(1).clone()
        dist.all_reduce(gmax_all, op=dist.ReduceOp.MAX, group=group)
        gmax_all = gmax_all.reshape(())
    return packed[0] > 0, packed[1] == 0, out, gmax_all
