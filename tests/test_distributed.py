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
import time
from datetime import timedelta
from pathlib import Path
from typing import Any

import pytest
import torch
from torch import nn

from stepsize_tower import Level, TowerAdam, TowerSGD, distributed

dist = torch.distributed

pytestmark = pytest.mark.skipif(
    not (dist.is_available() and dist.is_gloo_available()), reason="torch.distributed with gloo is not available"
)

WORLD = 2
STEPS = 14  # past the retreat window (10): both the start-up and the later code paths run
GLOBAL_BATCH = 16
#: Sharded/replicated runs against the single-process run, float64 (only the summation order
#: differs): measured at most 1.1e-14 relative (HSDP with an "sgd" level) and 4.4e-16 absolute
#: (on entries near 0; DDP, ZeRO, FSDP2, HSDP, every optimizer kind below).
TOL = 1e-13
ATOL = 2e-15

#: A collective that not every rank joins fails after this (gloo's timeout) instead of hanging ...
COLLECTIVE_TIMEOUT = timedelta(seconds=60)
#: ... and a test fails when its ranks have not all finished after this (a backstop for anything else).
JOIN_TIMEOUT_S = 300.0


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


def _local(
    batch: tuple[torch.Tensor, torch.Tensor], rank: int, world: int = WORLD
) -> tuple[torch.Tensor, torch.Tensor]:
    """This rank's part of the global batch (DDP / FSDP average the parts' gradients)."""
    part = GLOBAL_BATCH // world
    x, y = batch
    return x[rank * part : (rank + 1) * part], y[rank * part : (rank + 1) * part]


def _groups(model: nn.Module) -> list[dict[str, Any]]:
    """Two groups; the second holds one tensor, so under ZeRO one rank holds none of it."""
    params = list(model.parameters())
    return [{"params": params[:-1]}, {"params": params[-1:]}]


_OPTIMIZERS: dict[str, tuple[type, dict[str, Any]]] = {
    # Adam: normalized, default horizon 0.999 (the trail of updates after the retreat window).
    "adam": (TowerAdam, {"lr": 1e-2}),
    # SGD with momentum: the trail (horizon 0.99), the growth guard on (the largest gradient entry is reduced too).
    "sgd": (TowerSGD, {"lr": 1e-2, "momentum": 0.9}),
    # Learned betas: the tangent dot products are reduced as well.
    "adam_betas": (TowerAdam, {"lr": 1e-2, "learn_betas": True}),
    # SGD with momentum at a typed step size 100x too large: it retreats at steps 1, 5, 6, 8 and 12.
    "sgd_retreats": (TowerSGD, {"lr": 1.0, "momentum": 0.9}),
    # An SGD-like level: its step is proportional to the hypergradient, so a dot product
    # counted twice (once per replica) would show in the step size.
    "adam_sgd_level": (TowerAdam, {"lr": 1e-2, "levels": [Level("sgd", lr=10.0)]}),
    # Typed far above the weights' size: the first-step limit fires, from each rank's tensors
    # (ZeRO: whole tensors on one rank each; FSDP2: a shard of every tensor on each rank).
    "adam_limited": (TowerAdam, {"lr": 3.0}),
}


def _reference(kind: str) -> dict[str, Any]:
    """Reference: single-process run of the same optimizer on the same global batch."""
    cls, kw = _OPTIMIZERS[kind]
    model = _model()
    opt = cls(_groups(model), **kw)
    for batch in _batches():
        opt.zero_grad()
        nn.functional.mse_loss(model(batch[0]), batch[1]).backward()
        opt.step()
    return {"sizes": opt.step_sizes(), "weights": [p.detach().clone() for p in model.parameters()]}


def _train(
    model: nn.Module, opt: Any, rank: int, steps: list[tuple[torch.Tensor, torch.Tensor]], world: int = WORLD
) -> None:
    for batch in steps:
        x, y = _local(batch, rank, world)
        opt.zero_grad()
        nn.functional.mse_loss(model(x), y).backward()
        opt.step()


def _entry(rank: int, port: int, worker: str, out: str, args: tuple[Any, ...], world: int = WORLD) -> None:
    os.environ["MASTER_ADDR"] = "127.0.0.1"
    os.environ["MASTER_PORT"] = str(port)
    torch.set_num_threads(1)
    dist.init_process_group("gloo", rank=rank, world_size=world, timeout=COLLECTIVE_TIMEOUT)
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


def _spawn(tmp_path: Path, worker: str, *args: Any, world: int = WORLD) -> list[dict[str, Any]]:
    """Run ``worker`` in ``world`` ranks; a rank that raises, or any rank still running after
    :data:`JOIN_TIMEOUT_S`, fails the test (naming the ranks) instead of hanging it."""
    ctx = torch.multiprocessing.start_processes(
        _entry, args=(_free_port(), worker, str(tmp_path), args, world), nprocs=world, join=False, start_method="spawn"
    )
    deadline = time.monotonic() + JOIN_TIMEOUT_S
    while not ctx.join(timeout=max(deadline - time.monotonic(), 0.001)):  # raises if a rank raised
        if time.monotonic() >= deadline:
            stuck = [rank for rank, proc in enumerate(ctx.processes) if proc.is_alive()]
            for proc in ctx.processes:
                if proc.is_alive():
                    proc.kill()
            pytest.fail(f"{worker}{args}: rank(s) {stuck} still running after {JOIN_TIMEOUT_S:.0f} s")
    return [torch.load(tmp_path / f"rank{r}.pt", weights_only=False) for r in range(world)]


def _assert_close(a: Any, b: Any, tol: float = TOL, atol: float = ATOL) -> None:
    ta, tb = torch.as_tensor(a, dtype=torch.float64), torch.as_tensor(b, dtype=torch.float64)
    assert torch.allclose(ta, tb, rtol=tol, atol=atol), (a, b)


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


def _hsdp_worker(rank: int, kind: str) -> dict[str, Any]:
    """4 ranks: a 2 x 2 mesh, replicated along dimension 0, sharded along dimension 1 (HSDP)."""
    from torch.distributed.device_mesh import init_device_mesh
    from torch.distributed.fsdp import fully_shard

    ref = _reference(kind)
    cls, kw = _OPTIMIZERS[kind]
    model = _model()
    fully_shard(model, mesh=init_device_mesh("cpu", (2, 2), mesh_dim_names=("replicate", "shard")))
    opt = cls(_groups(model), sharded=True, **kw)
    _train(model, opt, rank, _batches(), world=4)
    weights = [p.full_tensor().detach().clone() for p in model.parameters()]
    return {"ref": ref, "sizes": opt.step_sizes(), "weights": weights}


def _make_fsdp(kind: str) -> tuple[nn.Module, Any]:
    from torch.distributed.fsdp import fully_shard

    cls, kw = _OPTIMIZERS[kind]
    model = _model()
    fully_shard(model)
    return model, cls(_groups(model), sharded=True, **kw)


def _outcome(model: nn.Module, opt: Any) -> dict[str, Any]:
    weights = [p.full_tensor().detach().clone() for p in model.parameters()]
    return {"sizes": opt.step_sizes(), "skipped": opt.skipped_steps(), "retreats": opt.retreats(), "weights": weights}


def _learned(opt: Any) -> dict[str, Any]:
    """Copies of what the optimizer learned: per group ``tower`` and ``effective_lr``, per
    parameter this rank's state (the shard under FSDP2)."""
    groups = [({k: v.clone() for k, v in g["tower"].items()}, g["effective_lr"].clone()) for g in opt.param_groups]
    params = [p for g in opt.param_groups for p in g["params"]]
    state = [{k: v.clone() for k, v in opt.state[p].items()} for p in params]
    return {"groups": groups, "state": state}


def _fsdp_resume_worker(rank: int, kinds: tuple[str, ...], out: str) -> dict[str, Any]:
    import torch.distributed.checkpoint as dcp
    from torch.distributed.checkpoint.state_dict import StateDictOptions, get_state_dict, set_state_dict

    batches = _batches()
    split = STEPS // 2
    result: dict[str, Any] = {}
    for kind in kinds:
        # Uninterrupted run.
        model, opt = _make_fsdp(kind)
        _train(model, opt, rank, batches)
        straight = _outcome(model, opt)
        # Half, then a sharded checkpoint (every rank writes its shards) and a full one (rank 0).
        model, opt = _make_fsdp(kind)
        _train(model, opt, rank, batches[:split])
        saved = _learned(opt)
        model_sd, optim_sd = get_state_dict(model, opt)
        per_param: dict[str, dict[str, Any]] = optim_sd["state"]  # type: ignore[assignment]
        state_types = sorted({type(v).__name__ for st in per_param.values() for v in st.values()})
        path = Path(out) / f"dcp_{kind}"
        dcp.save({"model": model_sd, "optim": optim_sd}, checkpoint_id=path)
        full = get_state_dict(model, opt, options=StateDictOptions(full_state_dict=True, cpu_offload=True))
        # Fresh model and optimizer, load, the other half.
        model, opt = _make_fsdp(kind)
        model_sd, optim_sd = get_state_dict(model, opt)
        dcp.load({"model": model_sd, "optim": optim_sd}, checkpoint_id=path)
        set_state_dict(model, opt, model_state_dict=model_sd, optim_state_dict=optim_sd)
        loaded = _learned(opt)
        at_load = opt.step_sizes()
        retreats_at_load = opt.retreats()
        _train(model, opt, rank, batches[split:])
        result[kind] = {
            "straight": straight,
            "resumed": _outcome(model, opt),
            "at_load": at_load,
            "retreats_at_load": retreats_at_load,
            "saved": saved,
            "loaded": loaded,
            "state_types": state_types,
            "full": full if rank == 0 else None,
        }
    return result


MASKED_STEPS, INF_STEP, NO_GRAD_STEP = 30, 20, 24


def _masked_run(rank: int, kind: str, frame: str, masked: bool) -> dict[str, Any]:
    """30 steps under ZeRO or FSDP2; at step 20 rank 0 alone has non-finite gradients, at step
    24 no rank has a gradient for the second group. With ``masked``, settled steps take the
    accelerators' path (``engine.MASK_ON_CPU``; level math on tensors in both runs), and host reads
    (``aten::_local_scalar_dense`` and ``Tensor.tolist``) are counted from step 12 on."""
    from torch.utils._python_dispatch import TorchDispatchMode

    import stepsize_tower.bases.native as native
    import stepsize_tower.engine as engine
    import stepsize_tower.levels as levels

    engine.MASK_ON_CPU, levels.HOST_MATH_MAX = masked, 0  # the level math as on an accelerator, both runs
    native.available = lambda: False  # type: ignore[assignment]  # torch's kernels, as on an accelerator
    reads = [0]

    class Reads(TorchDispatchMode):
        def __torch_dispatch__(self, func: Any, types: Any, args: Any = (), kwargs: Any = None) -> Any:
            if func in (torch.ops.aten._local_scalar_dense.default, torch.ops.aten.item.default):
                reads[0] += 1
            return func(*args, **(kwargs or {}))

    tolist = torch.Tensor.tolist

    def counted(self: torch.Tensor) -> Any:
        reads[0] += 1
        return tolist(self)

    cls, kw = _OPTIMIZERS[kind]
    model: nn.Module = _model()
    if frame == "fsdp":
        from torch.distributed.fsdp import fully_shard

        fully_shard(model)
        opt = cls(_groups(model), sharded=True, **kw)
        wrapped = model
    else:
        wrapped = nn.parallel.DistributedDataParallel(model)
        opt = _make_zero(model, kind, True)
    params = list(model.parameters())
    batches = _batches()
    for step in range(MASKED_STEPS):
        x, y = _local(batches[step % len(batches)], rank)
        opt.zero_grad()
        nn.functional.mse_loss(wrapped(x), y).backward()
        if step == INF_STEP and rank == 0:
            for p in params:
                distributed.shard(p.grad).fill_(float("inf"))
        if step == NO_GRAD_STEP:
            params[-1].grad = None
        counting = masked and step >= 12
        torch.Tensor.tolist = counted if counting else tolist  # type: ignore[method-assign]
        try:
            if counting:
                with Reads():
                    opt.step()
            else:
                opt.step()
        finally:
            torch.Tensor.tolist = tolist  # type: ignore[method-assign]
    inner = opt.optim if frame == "zero" else opt
    weights = [(p.full_tensor() if frame == "fsdp" else p).detach().clone() for p in params]
    return {"reads": reads[0], "weights": weights, "sizes": inner.step_sizes(), "skipped": inner.skipped_steps()}


def _masked_worker(rank: int, kind: str, frame: str) -> dict[str, Any]:
    return {"masked": _masked_run(rank, kind, frame, True), "read": _masked_run(rank, kind, frame, False)}


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


@pytest.mark.parametrize("kind", ["adam", "sgd", "adam_betas", "adam_limited"])
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
        assert r["resumed"] == r["straight"]  # measured: bitwise
    assert r0["resumed"] == r1["resumed"]


@pytest.mark.parametrize("kind", ["adam", "sgd", "adam_limited"])
def test_fsdp2_sharded_matches_single_process(tmp_path: Path, kind: str) -> None:
    pytest.importorskip("torch.distributed.fsdp")
    r0, r1 = _spawn(tmp_path, "_fsdp_worker", kind)
    assert r0["sizes"] == r1["sizes"]
    # reference: single-process run on the same global batch
    _assert_close(_flat_sizes(r0["sizes"]), _flat_sizes(r0["ref"]["sizes"]))
    for w, ref in zip(r0["weights"], r0["ref"]["weights"], strict=True):
        _assert_close(w, ref)


def _assert_same_learned(a: dict[str, Any], b: dict[str, Any]) -> None:
    for (tower_a, eff_a), (tower_b, eff_b) in zip(a["groups"], b["groups"], strict=True):
        assert tower_a.keys() == tower_b.keys()
        assert all(torch.equal(tower_a[k], tower_b[k]) for k in tower_a), (tower_a, tower_b)
        assert torch.equal(eff_a, eff_b)
    for st_a, st_b in zip(a["state"], b["state"], strict=True):
        assert st_a.keys() == st_b.keys()
        assert all(torch.equal(st_a[k], st_b[k]) for k in st_a), (st_a, st_b)


_RESUME_KINDS = ("adam", "sgd_retreats")


@pytest.fixture(scope="module")
def fsdp_resume(tmp_path_factory: pytest.TempPathFactory) -> list[dict[str, Any]]:
    """One 2-rank run of :func:`_fsdp_resume_worker` for both tests below (spawning costs seconds)."""
    pytest.importorskip("torch.distributed.fsdp")
    tmp_path = tmp_path_factory.mktemp("fsdp_resume")
    return _spawn(tmp_path, "_fsdp_resume_worker", _RESUME_KINDS, str(tmp_path))


def test_fsdp2_distributed_checkpoint_resumes(fsdp_resume: list[dict[str, Any]]) -> None:
    """Save mid-run with torch.distributed.checkpoint, load into a fresh FSDP2 model and optimizer,
    train on: the same as never stopping. The last layer splits 2 + 1 rows over the ranks, so a
    shard saved as one rank's copy for both would not even load."""
    r0, r1 = fsdp_resume
    for kind in _RESUME_KINDS:
        for r in (r0[kind], r1[kind]):
            # reference: the checkpointed optimizer itself (get_state_dict, dcp.save / dcp.load, set_state_dict)
            _assert_same_learned(r["loaded"], r["saved"])
            assert "DTensor" in r["state_types"]  # shard buffers handed to the checkpoint API as DTensors
            assert r["at_load"] != r["straight"]["sizes"]  # the checkpoint was mid-run
            # reference: the uninterrupted run of the same 14 steps (bitwise)
            assert r["resumed"]["sizes"] == r["straight"]["sizes"]
            assert r["resumed"]["skipped"] == r["straight"]["skipped"]
            assert r["resumed"]["retreats"] == r["straight"]["retreats"]
            if kind == "sgd_retreats":  # retreats on both sides of the checkpoint: their state is carried
                assert 0 < r["retreats_at_load"] < r["straight"]["retreats"]
            for w, ref in zip(r["resumed"]["weights"], r["straight"]["weights"], strict=True):
                assert torch.equal(w, ref)
        assert r0[kind]["resumed"]["sizes"] == r1[kind]["resumed"]["sizes"]


def test_fsdp2_full_checkpoint_resumes_in_one_process(fsdp_resume: list[dict[str, Any]]) -> None:
    """The consolidated checkpoint (``full_state_dict=True, cpu_offload=True``) loads into a plain
    single-process optimizer, which continues as the FSDP2 run does on the same global batch."""
    r0 = fsdp_resume[0]
    for kind in _RESUME_KINDS:
        model_sd, optim_sd = r0[kind]["full"]
        cls, kw = _OPTIMIZERS[kind]
        model = _model()
        opt = cls(_groups(model), **kw)
        model.load_state_dict(model_sd)
        opt.load_state_dict(optim_sd)  # no process group here: the saved sharded=True is inert
        assert opt.step_sizes() == r0[kind]["at_load"]
        for batch in _batches()[STEPS // 2 :]:
            opt.zero_grad()
            nn.functional.mse_loss(model(batch[0]), batch[1]).backward()
            opt.step()
        # reference: the uninterrupted FSDP2 run (same math, summation order of two shards)
        straight = r0[kind]["straight"]
        _assert_close(_flat_sizes(opt.step_sizes()), _flat_sizes(straight["sizes"]))
        assert (opt.skipped_steps(), opt.retreats()) == (straight["skipped"], straight["retreats"])
        for w, ref in zip(model.parameters(), straight["weights"], strict=True):
            _assert_close(w.detach(), ref)


@pytest.mark.parametrize("kind", ["adam", "adam_sgd_level"])
def test_hsdp_sums_over_the_shard_group_only(tmp_path: Path, kind: str) -> None:
    """HSDP (2 replicas x 2 shards): replicas hold the same shard, so the dot products are
    summed over the sharding dimension only; all 4 ranks equal the single-process run."""
    results = _spawn(tmp_path, "_hsdp_worker", kind, world=4)
    for r in results[1:]:
        assert r["sizes"] == results[0]["sizes"]  # bitwise across ranks
    # reference: single-process run on the same global batch
    _assert_close(_flat_sizes(results[0]["sizes"]), _flat_sizes(results[0]["ref"]["sizes"]))
    for w, ref in zip(results[0]["weights"], results[0]["ref"]["weights"], strict=True):
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


@pytest.mark.parametrize(("kind", "frame"), [("adam", "zero"), ("sgd", "fsdp")])
def test_sharded_settled_steps_read_nothing_and_equal_the_read_path(tmp_path: Path, kind: str, frame: str) -> None:
    """Sharded groups on the accelerators' path: no host read after the start-up window, a
    skip on one rank is a skip on all, a step without any gradient changes nothing; the
    result is the read path's bit for bit (reference: the read path, common practice)."""
    results = _spawn(tmp_path, "_masked_worker", kind, frame)
    for r in results:
        masked, read = r["masked"], r["read"]
        assert masked["reads"] == 0, f"{frame}/{kind}: {masked['reads']} host reads after the window"
        assert masked["skipped"] == read["skipped"] >= 1, (masked["skipped"], read["skipped"])
        assert masked["sizes"] == read["sizes"]
        for a, b in zip(masked["weights"], read["weights"], strict=True):
            assert torch.equal(a, b)
    assert results[0]["masked"]["sizes"] == results[1]["masked"]["sizes"]
