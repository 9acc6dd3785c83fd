"""Distributed training: DDP, ZeroRedundancyOptimizer and FSDP2 with 2 gloo ranks on 127.0.0.1.

Every test spawns two processes (``torch.multiprocessing.spawn``) that join a gloo process
group on the loopback address, train a small float64 network, and write what they saw to a
temporary folder; the parent process compares. The reference throughout is a single-process
run of the same optimizer on the same global batch (computed inside each rank, before any
collective), so "matches" means: sharding changed nothing but the summation order.
"""

from __future__ import annotations

import os
import socket
import sys
from pathlib import Path
from typing import Any

import pytest
import torch
from torch import nn

from stepsize_tower import TowerAdam, TowerSGD

dist = torch.distributed

pytestmark = pytest.mark.skipif(
    not (dist.is_available() and dist.is_gloo_available()), reason="torch.distributed with gloo is not available"
)

WORLD = 2
STEPS = 14  # past the retreat window (10): both the start-up and the later code paths run
GLOBAL_BATCH = 16
TOL = 1e-10


# ---------------------------------------------------------------------- helpers run in every rank


def _model() -> nn.Module:
    torch.manual_seed(0)
    return nn.Sequential(nn.Linear(6, 16), nn.Tanh(), nn.Linear(16, 3)).double()


def _batches() -> list[tuple[torch.Tensor, torch.Tensor]]:
    gen = torch.Generator().manual_seed(1)
    return [
        (torch.randn(GLOBAL_BATCH, 6, generator=gen, dtype=torch.float64),
         torch.randn(GLOBAL_BATCH, 3, generator=gen, dtype=torch.float64))
        for _ in range(STEPS)
    ]  # fmt: skip


def _local(batch: tuple[torch.Tensor, torch.Tensor], rank: int) -> tuple[torch.Tensor, torch.Tensor]:
    """This rank's half of the global batch (DDP averages the two halves' gradients)."""
    half = GLOBAL_BATCH // WORLD
    x, y = batch
    return x[rank * half : (rank + 1) * half], y[rank * half : (rank + 1) * half]


def _groups(model: nn.Module) -> list[dict[str, Any]]:
    """Two groups; the second holds one tensor, so under ZeRO one rank holds none of it."""
    params = list(model.parameters())
    return [{"params": params[:-1]}, {"params": params[-1:]}]


_OPTIMIZERS: dict[str, tuple[type, dict[str, Any]]] = {
    # Adam: normalized, default horizon 0.99 (the trail of updates after the retreat window).
    "adam": (TowerAdam, {"lr": 1e-2}),
    # SGD with momentum: horizon 0, the growth guard on (the largest gradient entry is reduced too).
    "sgd": (TowerSGD, {"lr": 1e-2, "momentum": 0.9}),
    # Learned betas: the tangent dot products are reduced as well.
    "adam_betas": (TowerAdam, {"lr": 1e-2, "learn_betas": True}),
}


#: Learned betas amplify float noise: at the second step the tangent dot products are ~1e-18
#: (zero up to rounding) and the Adam-like hyper level turns their sign into a full-size move,
#: so the full-batch gradient and the mean of the two half-batch gradients (what DDP computes)
#: end 6e-4 apart. Its reference therefore forms the global-batch gradient as that mean.
_HALVES = {"adam_betas"}


def _reference(kind: str) -> dict[str, Any]:
    """Reference: single-process run of the same optimizer on the same global batch."""
    cls, kw = _OPTIMIZERS[kind]
    model = _model()
    opt = cls(_groups(model), **kw)
    for batch in _batches():
        opt.zero_grad()
        if kind in _HALVES:
            for rank in range(WORLD):
                x, y = _local(batch, rank)
                (nn.functional.mse_loss(model(x), y) / WORLD).backward()
        else:
            nn.functional.mse_loss(model(batch[0]), batch[1]).backward()
        opt.step()
    return {"sizes": opt.step_sizes(), "weights": [p.detach().clone() for p in model.parameters()]}


def _train(model: nn.Module, opt: Any, rank: int, steps: list[tuple[torch.Tensor, torch.Tensor]]) -> None:
    for batch in steps:
        x, y = _local(batch, rank)
        opt.zero_grad()
        nn.functional.mse_loss(model(x), y).backward()
        opt.step()


def _entry(rank: int, port: int, worker: str, out: str, args: tuple[Any, ...]) -> None:
    os.environ["MASTER_ADDR"] = "127.0.0.1"
    os.environ["MASTER_PORT"] = str(port)
    torch.set_num_threads(1)
    dist.init_process_group("gloo", rank=rank, world_size=WORLD)
    try:
        result = globals()[worker](rank, *args)
        torch.save(result, Path(out) / f"rank{rank}.pt")
        dist.barrier()  # no rank tears gloo down while the other still talks to it
    finally:
        dist.destroy_process_group()
    # gloo's threads can abort the interpreter's own teardown afterwards (SIGABRT, "terminate
    # called without an active exception", seen in about 1 of 3 runs of this file, always after
    # the results were saved and the group destroyed): leave at once, with exit status 0.
    sys.stdout.flush()
    sys.stderr.flush()
    os._exit(0)


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _spawn(tmp_path: Path, worker: str, *args: Any) -> list[dict[str, Any]]:
    torch.multiprocessing.spawn(_entry, args=(_free_port(), worker, str(tmp_path), args), nprocs=WORLD, join=True)
    return [torch.load(tmp_path / f"rank{r}.pt", weights_only=False) for r in range(WORLD)]


def _assert_close(a: Any, b: Any, tol: float = TOL) -> None:
    ta, tb = torch.as_tensor(a, dtype=torch.float64), torch.as_tensor(b, dtype=torch.float64)
    assert torch.allclose(ta, tb, rtol=tol, atol=tol), (a, b)


def _flat_sizes(sizes: list[list[float]]) -> list[float]:
    return [x for group in sizes for x in group]


# ---------------------------------------------------------------------- workers


def _ddp_worker(rank: int, kind: str) -> dict[str, Any]:
    ref = _reference(kind)
    cls, kw = _OPTIMIZERS[kind]
    model = nn.parallel.DistributedDataParallel(_model())
    opt = cls(_groups(model.module), **kw)  # replicated: no sharded option needed
    _train(model, opt, rank, _batches())
    return {"ref": ref, "sizes": opt.step_sizes(), "weights": [p.detach().clone() for p in model.parameters()]}


def _make_zero(model: nn.Module, kind: str, sharded: bool) -> Any:
    cls, kw = _OPTIMIZERS[kind]
    from torch.distributed.optim import ZeroRedundancyOptimizer

    return ZeroRedundancyOptimizer(_groups(model), optimizer_class=cls, sharded=sharded, **kw)


def _zero_worker(rank: int, kind: str, sharded: bool) -> dict[str, Any]:
    ref = _reference(kind)
    model = nn.parallel.DistributedDataParallel(_model())
    zero = _make_zero(model.module, kind, sharded)
    _train(model, zero, rank, _batches())
    return {
        "ref": ref,
        "sizes": zero.optim.step_sizes(),
        "weights": [p.detach().clone() for p in model.parameters()],
        "held": [len(g["params"]) for g in zero.optim.param_groups],
    }


def _zero_resume_worker(rank: int, out: str) -> dict[str, Any]:
    batches = _batches()
    split = STEPS // 2
    # Uninterrupted run.
    model = nn.parallel.DistributedDataParallel(_model())
    zero = _make_zero(model.module, "adam", True)
    _train(model, zero, rank, batches)
    straight = zero.optim.step_sizes()
    # Half, checkpoint (consolidated on rank 0), fresh setup, load, the other half.
    model = nn.parallel.DistributedDataParallel(_model())
    zero = _make_zero(model.module, "adam", True)
    _train(model, zero, rank, batches[:split])
    zero.consolidate_state_dict(to=0)
    path = Path(out) / "zero.pt"
    if rank == 0:
        torch.save({"model": model.module.state_dict(), "optim": zero.state_dict()}, path)
    dist.barrier()
    ckpt = torch.load(path, weights_only=True)
    model = nn.parallel.DistributedDataParallel(_model())
    model.module.load_state_dict(ckpt["model"])
    zero = _make_zero(model.module, "adam", True)
    zero.load_state_dict(ckpt["optim"])
    at_load = zero.optim.step_sizes()
    _train(model, zero, rank, batches[split:])
    return {"straight": straight, "resumed": zero.optim.step_sizes(), "at_load": at_load}


def _fsdp_worker(rank: int, kind: str) -> dict[str, Any]:
    from torch.distributed.fsdp import fully_shard

    ref = _reference(kind)
    cls, kw = _OPTIMIZERS[kind]
    model = _model()
    fully_shard(model)
    opt = cls(_groups(model), sharded=True, **kw)
    _train(model, opt, rank, _batches())
    weights = [p.full_tensor().detach().clone() for p in model.parameters()]
    return {"ref": ref, "sizes": opt.step_sizes(), "weights": weights}


# ---------------------------------------------------------------------- tests


@pytest.mark.parametrize("kind", ["adam", "sgd"])
def test_ddp_matches_single_process(tmp_path: Path, kind: str) -> None:
    """DDP all-reduces gradients: both ranks equal the reference without any option."""
    r0, r1 = _spawn(tmp_path, "_ddp_worker", kind)
    assert r0["sizes"] == r1["sizes"]  # bitwise: same gradients, same decisions
    for w0, w1 in zip(r0["weights"], r1["weights"], strict=True):
        assert torch.equal(w0, w1)
    # reference: single-process run on the same global batch
    _assert_close(_flat_sizes(r0["sizes"]), _flat_sizes(r0["ref"]["sizes"]))
    for w, ref in zip(r0["weights"], r0["ref"]["weights"], strict=True):
        _assert_close(w, ref)


@pytest.mark.parametrize("kind", ["adam", "sgd", "adam_betas"])
def test_zero_sharded_matches_single_process(tmp_path: Path, kind: str) -> None:
    r0, r1 = _spawn(tmp_path, "_zero_worker", kind, True)
    assert 0 in r0["held"] + r1["held"]  # one rank holds none of the second group: it still takes part
    assert r0["sizes"] == r1["sizes"]  # bitwise: every rank decides from the same reduced values
    # reference: single-process run of the same optimizer on the same global batch (unsharded)
    _assert_close(_flat_sizes(r0["sizes"]), _flat_sizes(r0["ref"]["sizes"]))
    for w0, w1, ref in zip(r0["weights"], r1["weights"], r0["ref"]["weights"], strict=True):
        assert torch.equal(w0, w1)  # ZeRO broadcasts each shard from its owner
        _assert_close(w0, ref)


def test_zero_without_option_drifts(tmp_path: Path) -> None:
    """Without ``sharded=True`` each rank learns from its own partial dot products: the test above
    would fail, so it does exercise the reduction."""
    r0, r1 = _spawn(tmp_path, "_zero_worker", "adam", False)
    a0, a1 = r0["sizes"][0][0], r1["sizes"][0][0]
    assert abs(a0 - a1) > 1e-6 * abs(a0), (a0, a1)


def test_zero_consolidated_checkpoint_resumes(tmp_path: Path) -> None:
    r0, r1 = _spawn(tmp_path, "_zero_resume_worker", str(tmp_path))
    for r in (r0, r1):
        assert r["at_load"] != r["straight"]  # the checkpoint was mid-run
        _assert_close(_flat_sizes(r["resumed"]), _flat_sizes(r["straight"]), tol=1e-12)
    assert r0["resumed"] == r1["resumed"]


@pytest.mark.parametrize("kind", ["adam", "sgd"])
def test_fsdp2_sharded_matches_single_process(tmp_path: Path, kind: str) -> None:
    pytest.importorskip("torch.distributed.fsdp")
    r0, r1 = _spawn(tmp_path, "_fsdp_worker", kind)
    assert r0["sizes"] == r1["sizes"]
    # reference: single-process run on the same global batch
    _assert_close(_flat_sizes(r0["sizes"]), _flat_sizes(r0["ref"]["sizes"]))
    for w, ref in zip(r0["weights"], r0["ref"]["weights"], strict=True):
        _assert_close(w, ref)


def test_sharded_option_is_validated_and_inert_without_process_group() -> None:
    model = _model()
    with pytest.raises(ValueError, match="granularity"):
        TowerAdam(model.parameters(), sharded=True, granularity="tensor")
    with pytest.raises(ValueError, match="sharded"):
        TowerSGD(model.parameters(), sharded="yes")  # type: ignore[arg-type]
    # reference: the same optimizer without the option (no process group: no collective, same math)
    ref_model = _model()
    opt, ref = TowerAdam(model.parameters(), sharded=True), TowerAdam(ref_model.parameters())
    for x, y in _batches()[:5]:
        for m, o in ((model, opt), (ref_model, ref)):
            o.zero_grad()
            nn.functional.mse_loss(m(x), y).backward()
            o.step()
    assert opt.step_sizes() == ref.step_sizes()
    assert opt.param_groups[0]["sharded"] is True
