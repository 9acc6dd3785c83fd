"""A plain training script, before and after the one-line swap to a tower optimizer.

python experiments/examples/before_after.py --steps 300
"""

from __future__ import annotations

import argparse

import _data
import torch

import stepsize_tower


def train(make_optimizer, steps: int) -> float:
    net = _data.model()
    optimizer = make_optimizer(net.parameters())
    for step in range(steps):
        optimizer.zero_grad()
        loss = _data.loss(net, step)
        loss.backward()
        optimizer.step()
    return loss.item()


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--steps", type=int, default=300)
    steps = parser.parse_args().steps
    for lr in (1e-5, 1e-3, 1e-1):
        before = train(lambda ps, lr=lr: torch.optim.Adam(ps, lr=lr), steps)  # before
        after = train(lambda ps, lr=lr: stepsize_tower.TowerAdam(ps, lr=lr), steps)  # after: the one-line swap
        print(f"typed lr {lr:g}: torch.optim.Adam final loss {before:.4f}, TowerAdam {after:.4f}")


if __name__ == "__main__":
    main()
