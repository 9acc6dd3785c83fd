"""Two processes on 127.0.0.1 (gloo): a tower under DDP and under ZeroRedundancyOptimizer.

python experiments/examples/distributed.py --steps 50

DDP all-reduces the gradients, so every rank computes the same dot products and learns the
same step size with no option. ZeRO gives each rank only some of the parameters: with
``sharded=True`` the tower all-reduces its dot products and the ranks agree; without it each
rank learns from its own part and the step sizes drift apart (printed for comparison).
"""

from __future__ import annotations

import argparse
import os
import socket
import sys

import _data
import torch
import torch.distributed as dist
from torch import nn
from torch.distributed.optim import ZeroRedundancyOptimizer

import stepsize_tower

WORLD = 2


def train(rank: int, steps: int, setup: str) -> list[float]:
    """Train on this rank's half of every global batch; return the step size per group."""
    model = nn.parallel.DistributedDataParallel(_data.model())
    # Two groups (weights, biases); ZeRO splits each group's tensors between the ranks.
    groups = [
        {"params": [p for n, p in model.module.named_parameters() if n.endswith("weight")]},
        {"params": [p for n, p in model.module.named_parameters() if n.endswith("bias")]},
    ]
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


def worker(rank: int, port: int, steps: int) -> None:
    os.environ["MASTER_ADDR"], os.environ["MASTER_PORT"] = "127.0.0.1", str(port)
    torch.set_num_threads(1)
    dist.init_process_group("gloo", rank=rank, world_size=WORLD)
    try:
        for setup in ("ddp", "zero, sharded=True", "zero, sharded=False"):
            sizes = train(rank, steps, setup)
            per_rank: list[list[float] | None] = [None] * WORLD
            dist.all_gather_object(per_rank, sizes)
            if rank == 0:
                same = "same on every rank" if all(s == per_rank[0] for s in per_rank) else "ranks DIFFER"
                print(f"{setup:20s} after {steps} steps ({same})")
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
    torch.multiprocessing.spawn(worker, args=(port, steps), nprocs=WORLD, join=True)


if __name__ == "__main__":
    main()
