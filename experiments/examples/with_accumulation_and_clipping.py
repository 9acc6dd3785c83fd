"""Gradient accumulation and clipping: the tower learns from the gradient it is given at step().

python experiments/examples/with_accumulation_and_clipping.py --steps 200
"""

from __future__ import annotations

import argparse

import _data
import torch

import stepsize_tower

MICRO_BATCHES = 4


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--steps", type=int, default=200)
    steps = parser.parse_args().steps
    net = _data.model()
    optimizer = stepsize_tower.TowerSGD(net.parameters(), lr=1e-2, momentum=0.9)
    for step in range(steps):
        optimizer.zero_grad()
        for micro in range(MICRO_BATCHES):
            (_data.loss(net, step * MICRO_BATCHES + micro) / MICRO_BATCHES).backward()
        torch.nn.utils.clip_grad_norm_(net.parameters(), max_norm=1.0)
        optimizer.step()  # sees the accumulated, clipped .grad: the hypergradient uses exactly that
    print(f"final loss {_data.loss(net, 10**6).item():.4f}; step sizes {optimizer.step_sizes()[0]}")


if __name__ == "__main__":
    main()
