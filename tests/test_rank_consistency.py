"""Ranks that hold different parameters must not drift apart silently (``sharded=None``, the default).

Two gloo processes on 127.0.0.1 run every scenario in ONE spawn (starting processes costs
seconds), with a bounded wait: the process group times out a mismatched collective after
``PG_TIMEOUT`` and the parent fails the test after ``DEADLINE`` instead of hanging.

* ZeRO without ``sharded=True``: each rank learns from a partial sum, so the step sizes
  differ between ranks (the drift is real); the first step warns once, with the fix, after
  exactly one all-reduce of 6 numbers.
* ZeRO with ``sharded=True``: no warning, the ranks agree (the fix works).
* ZeRO with ``sharded=False``: the user opted out: no warning and no collective.
* DDP (replicated parameters): one all-reduce, no warning, the ranks agree.
* FSDP2 without the option: DTensor parameters reduce by themselves; reference: a
  single-process run of the same optimizer on the same global batch.
"""

from __future__ import annotations

import os
import socket
import sys
import time
import warnings
from datetime import timedelta
from pathlib import Path
from typing import Any

import pytest
import torch
from torch import nn

from stepsize_tower import TowerAdam, TowerSGD
from stepsize_tower._rank_check import check_once, fingerprint

dist = torch.distributed

WORLD = 2
STEPS = 6
GLOBAL_BATCH = 16
PG_TIMEOUT = timedelta(seconds=60)  # a collective one rank never joins fails after this
DEADLINE = 300.0  # seconds for the whole spawn (process start-up on a busy machine included)

distributed = pytest.mark.skipif(
    not (dist.is_available() and dist.is_gloo_available()), reason="torch.distributed with gloo is not available"
)


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


def _train(model: nn.Module, opt: Any, rank: int, world: int) -> None:
    part = GLOBAL_BATCH // world
    for x, y in _batches():
        opt.zero_grad()
        nn.functional.mse_loss(model(x[rank * part : (rank + 1) * part]), y[rank * part : (rank + 1) * part]).backward()
        opt.step()


# ---------------------------------------------------------------------- run in every rank


def _observe(build: Any, rank: int) -> dict[str, Any]:
    """Train one setup; record the step sizes, the warnings and the all-reduce calls."""
    sizes: list[int] = []
    original = dist.all_reduce

    def counting(tensor: torch.Tensor, *args: Any, **kwargs: Any) -> Any:
        sizes.append(tensor.numel())
        return original(tensor, *args, **kwargs)

    dist.all_reduce = counting  # type: ignore[assignment]
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            model, opt, inner = build()
            _train(model, opt, rank, WORLD)
    finally:
        dist.all_reduce = original
    return {
        "sizes": inner.step_sizes(),
        "warnings": [str(w.message) for w in caught if issubclass(w.category, RuntimeWarning)],
        "all_reduce": sizes,
    }


def _zero(sharded: bool | None) -> Any:
    from torch.distributed.optim import ZeroRedundancyOptimizer

    model = nn.parallel.DistributedDataParallel(_model())
    kw: dict[str, Any] = {} if sharded is None else {"sharded": sharded}
    zero = ZeroRedundancyOptimizer(model.parameters(), optimizer_class=TowerAdam, lr=1e-2, **kw)
    return model, zero, zero.optim


def _ddp() -> Any:
    model = nn.parallel.DistributedDataParallel(_model())
    opt = TowerSGD(model.parameters(), lr=1e-2, momentum=0.9)
    return model, opt, opt


def _fsdp(sharded: bool | None) -> Any:
    from torch.distributed.fsdp import fully_shard

    model = _model()
    fully_shard(model)
    kw: dict[str, Any] = {} if sharded is None else {"sharded": sharded}
    opt = TowerAdam(model.parameters(), lr=1e-2, **kw)  # None: detected from the DTensors
    return model, opt, opt


def _scenarios(rank: int) -> dict[str, Any]:
    out: dict[str, Any] = {
        "zero_default": _observe(lambda: _zero(None), rank),
        "zero_sharded": _observe(lambda: _zero(True), rank),
        "zero_opted_out": _observe(lambda: _zero(False), rank),
        "ddp": _observe(_ddp, rank),
        "fsdp_default": _observe(lambda: _fsdp(None), rank),
    }
    try:  # both ranks raise at the first step, before any collective of the optimizer's
        _observe(lambda: _fsdp(False), rank)
        out["fsdp_opted_out_error"] = ""
    except RuntimeError as err:
        out["fsdp_opted_out_error"] = str(err)
    return out


def _entry(rank: int, port: int, out: str) -> None:
    os.environ["MASTER_ADDR"] = "127.0.0.1"
    os.environ["MASTER_PORT"] = str(port)
    torch.set_num_threads(1)
    dist.init_process_group("gloo", rank=rank, world_size=WORLD, timeout=PG_TIMEOUT)
    try:
        torch.save(_scenarios(rank), Path(out) / f"rank{rank}.pt")
        dist.barrier()
    finally:
        dist.destroy_process_group()
    sys.stdout.flush()
    sys.stderr.flush()
    os._exit(0)  # gloo's threads can abort the interpreter's own teardown (see test_distributed.py)


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _spawn_bounded(tmp_path: Path) -> list[dict[str, Any]]:
    """Run :func:`_entry` on every rank; fail (never hang) if they are not done by the deadline."""
    ctx = torch.multiprocessing.spawn(_entry, args=(_free_port(), str(tmp_path)), nprocs=WORLD, join=False)
    end = time.monotonic() + DEADLINE
    while not ctx.join(timeout=max(0.0, end - time.monotonic())):
        if time.monotonic() >= end:
            for proc in ctx.processes:
                proc.kill()
            pytest.fail(f"the {WORLD} ranks did not finish within {DEADLINE:.0f} s (a collective hung?)")
    return [torch.load(tmp_path / f"rank{r}.pt", weights_only=False) for r in range(WORLD)]


@pytest.fixture(scope="module")
def ranks(tmp_path_factory: pytest.TempPathFactory) -> list[dict[str, Any]]:
    pytest.importorskip("torch.distributed.fsdp")
    return _spawn_bounded(tmp_path_factory.mktemp("rank_consistency"))


# ---------------------------------------------------------------------- tests


@distributed
def test_zero_without_sharded_warns_once_with_the_fix(ranks: list[dict[str, Any]]) -> None:
    r0, r1 = (r["zero_default"] for r in ranks)
    assert r0["sizes"] != r1["sizes"]  # the drift the warning is about is real
    for r in (r0, r1):
        assert len(r["warnings"]) == 1, r["warnings"]
        assert "sharded=True" in r["warnings"][0] and "ZeroRedundancyOptimizer" in r["warnings"][0]
        assert r["all_reduce"] == [6]  # one small collective, at the first step only


@distributed
def test_zero_with_sharded_agrees_without_warning(ranks: list[dict[str, Any]]) -> None:
    r0, r1 = (r["zero_sharded"] for r in ranks)
    assert r0["warnings"] == r1["warnings"] == []
    assert r0["sizes"] == r1["sizes"]


@distributed
def test_zero_opted_out_calls_no_collective(ranks: list[dict[str, Any]]) -> None:
    for r in (ranks[0]["zero_opted_out"], ranks[1]["zero_opted_out"]):
        assert r["warnings"] == [] and r["all_reduce"] == []


@distributed
def test_ddp_replicated_parameters_check_once_and_do_not_warn(ranks: list[dict[str, Any]]) -> None:
    r0, r1 = (r["ddp"] for r in ranks)
    for r in (r0, r1):
        assert r["warnings"] == [] and r["all_reduce"] == [6]
    assert r0["sizes"] == r1["sizes"]


@distributed
def test_fsdp2_dtensor_parameters_reduce_without_being_asked(ranks: list[dict[str, Any]]) -> None:
    r0, r1 = (r["fsdp_default"] for r in ranks)
    assert r0["warnings"] == r1["warnings"] == []
    assert r0["sizes"] == r1["sizes"]
    assert len(r0["all_reduce"]) >= STEPS  # the group's dot products every step (and the first-step limit)
    # reference: the same optimizer in one process on the same global batch
    model = _model()
    opt = TowerAdam(model.parameters(), lr=1e-2)
    _train(model, opt, 0, 1)
    for ours, ref in zip(r0["sizes"][0], opt.step_sizes()[0], strict=True):
        assert ours == pytest.approx(ref, rel=1e-12, abs=0)
    assert "sharded=True" in ranks[0]["fsdp_opted_out_error"]  # sharded=False keeps refusing


# ---------------------------------------------------------------------- one process


def _grads(params: list[torch.Tensor]) -> list[torch.Tensor]:
    for p in params:
        p.grad = torch.ones_like(p)
    return params


def test_fingerprint_tells_partitions_apart_and_ignores_groups_that_do_not_check() -> None:
    a, b, c = _grads([torch.zeros(3, 4), torch.zeros(4), torch.zeros(12)])
    levels = [{"kind": "adam", "lr": 0.05, "betas": (0.9, 0.999), "eps": 1e-8}]

    def group(params: list[torch.Tensor], **kw: Any) -> dict[str, Any]:
        return {"params": params, "levels": levels, "sharded": None, "granularity": "group", **kw}

    whole = fingerprint([group([a, b, c])])
    assert whole == fingerprint([group([c, b, a])])  # the same parameters, in any order
    assert whole == [28.0, whole[1], 1.0]
    # ZeRO-like partitions: different counts, or the same count in different shapes
    assert fingerprint([group([a, b])]) != fingerprint([group([c])])
    assert fingerprint([group([a])])[0] == fingerprint([group([c])])[0]
    assert fingerprint([group([a])]) != fingerprint([group([c])])
    # groups that reduce, opted out, or learn nothing are not compared; nor are params without grads
    empty = [0.0, 0.0, 0.0]
    assert fingerprint([group([a], sharded=True), group([b], sharded=False), group([c], levels=[])]) == empty
    b.grad = None
    assert fingerprint([group([a, b])]) == fingerprint([group([a])])


def test_check_costs_nothing_without_a_process_group() -> None:
    opt = TowerAdam([torch.zeros(2, requires_grad=True)])
    check_once(opt)  # no process group: no collective, and it is not marked done
    assert not getattr(opt, "_tower_ranks_checked", False)


def test_sharded_accepts_none_true_false_only() -> None:
    assert TowerAdam([torch.zeros(2, requires_grad=True)]).param_groups[0]["sharded"] is None
    for value in (True, False, None):
        TowerSGD([torch.zeros(2, requires_grad=True)], sharded=value)
    with pytest.raises(ValueError, match="True, False or None"):
        TowerSGD([torch.zeros(2, requires_grad=True)], sharded="auto")  # type: ignore[arg-type]
