"""Two processes on 127.0.0.1 (gloo): a tower under DDP, ZeroRedundancyOptimizer and FSDP2.

python experiments/examples/distributed.py --steps 50

DDP all-reduces the gradients, so every rank computes the same dot products and learns the
same step size with no option. ZeRO gives each rank only some of the parameters: with
``sharded=True`` the tower all-reduces its dot products and the ranks agree; without it each
rank learns from its own part and the step sizes drift apart (printed for comparison).
FSDP2 (``fully_shard``, ``sharded=True``) is run twice: straight through, and saved half-way
with torch.distributed.checkpoint, loaded into a fresh model and optimizer and continued; the
two end with the same step sizes.
"""

from __future__ import annotations

import argparse
import os
import socket
import sys
import tempfile

import _data
import torch
import torch.distributed as dist
from torch import nn
from torch.distributed.optim import ZeroRedundancyOptimizer

import stepsize_tower

WORLD = 2


def groups_of(module: nn.Module) -> list[dict[str, list[nn.Parameter]]]:
    """Two groups (weights, biases); ZeRO splits each group's tensors between the ranks."""
    return [
        {"params": [p for n, p in module.named_parameters() if n.endswith("weight")]},
        {"params": [p for n, p in module.named_parameters() if n.endswith("bias")]},
    ]


def train_fsdp2(rank: int, steps: int, checkpoint: str | None) -> list[float]:
    """FSDP2; with ``checkpoint`` (a folder), save half-way, rebuild, load and go on."""
    import torch.distributed.checkpoint as dcp
    from torch.distributed.checkpoint.state_dict import get_state_dict, set_state_dict
    from torch.distributed.fsdp import fully_shard

    def build() -> tuple[nn.Module, stepsize_tower.TowerAdam]:
        model = _data.model()
        fully_shard(model)
        return model, stepsize_tower.TowerAdam(groups_of(model), lr=1e-3, sharded=True)

    model, optimizer = build()
    for step in range(steps):
        if checkpoint is not None and step == steps // 2:
            model_sd, optim_sd = get_state_dict(model, optimizer)
            dcp.save({"model": model_sd, "optim": optim_sd}, checkpoint_id=checkpoint)
            model, optimizer = build()  # fresh, as after a restart
            model_sd, optim_sd = get_state_dict(model, optimizer)
            dcp.load({"model": model_sd, "optim": optim_sd}, checkpoint_id=checkpoint)
            set_state_dict(model, optimizer, model_state_dict=model_sd, optim_state_dict=optim_sd)
        x, y = _data.batch(step)
        half = x.shape[0] // WORLD
        optimizer.zero_grad()
        nn.functional.mse_loss(model(x[rank * half : (rank + 1) * half]), y[rank * half : (rank + 1) * half]).backward()
        optimizer.step()
    return [sizes[0] for sizes in optimizer.step_sizes()]


def train(rank: int, steps: int, setup: str, folder: str) -> list[float]:
    """Train on this rank's half of every global batch; return the step size per group."""
    if setup.startswith("fsdp2"):
        return train_fsdp2(rank, steps, os.path.join(folder, "checkpoint") if "checkpoint" in setup else None)
    model = nn.parallel.DistributedDataParallel(_data.model())
    groups = groups_of(model.module)
    if setup == "ddp":
        optimizer = stepsize_tower.TowerAdam(groups, lr=1e-3)
    else:
        sharded = setup == "zero, sharded=True"
        optimizer = ZeroRedundancyOptimizer(groups, optimizer_class=stepsize_tower.TowerAdam, lr=1e-3, sharded=sharded)
    for step in range(steps):
        x, y = _data.batch(step)
        half = x.shape[0] // WORLD
        x, y = x[rank * half : (rank + 1) * half], y[rank * half : (rank + 1) * half]
        optimizer.zero_grad()
        nn.functional.mse_loss(model(x), y).backward()
        optimizer.step()
    tower = optimizer if setup == "ddp" else optimizer.optim  # ZeRO's local optimizer on this rank
    return [sizes[0] for sizes in tower.step_sizes()]


def worker(rank: int, port: int, steps: int, folder: str) -> None:
    os.environ["MASTER_ADDR"], os.environ["MASTER_PORT"] = "127.0.0.1", str(port)
    torch.set_num_threads(1)
    dist.init_process_group("gloo", rank=rank, world_size=WORLD)
    try:
        for setup in ("ddp", "zero, sharded=True", "zero, sharded=False", "fsdp2", "fsdp2, via checkpoint"):
            sizes = train(rank, steps, setup, folder)
            per_rank: list[list[float] | None] = [None] * WORLD
            dist.all_gather_object(per_rank, sizes)
            if rank == 0:
                same = "same on every rank" if all(s == per_rank[0] for s in per_rank) else "ranks DIFFER"
                print(f"{setup:22s} after {steps} steps ({same})")
                for r, s in enumerate(per_rank):
                    print(f"    rank {r}: step size per group " + "  ".join(f"{a:.6f}" for a in s or []))
        dist.barrier()  # no rank tears gloo down while the other still talks to it
    finally:
        dist.destroy_process_group()
    # gloo's threads can abort the interpreter's own teardown (SIGABRT) now and then: the work is
    # done and printed, so leave at once with exit status 0.
    sys.stdout.flush()
    os._exit(0)


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--steps", type=int, default=50)
    steps = parser.parse_args().steps
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    with tempfile.TemporaryDirectory() as folder:
        torch.multiprocessing.spawn(worker, args=(port, steps, folder), nprocs=WORLD, join=True)


if __name__ == "__main__":
    main()
