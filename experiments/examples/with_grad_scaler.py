"""Mixed precision on CPU: bfloat16 autocast with torch.amp.GradScaler; overflow steps leave the tower untouched.

python experiments/examples/with_grad_scaler.py --steps 200
"""

from __future__ import annotations

import argparse

import _data
import torch

import stepsize_tower


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--steps", type=int, default=200)
    steps = parser.parse_args().steps
    net = _data.model()
    optimizer = stepsize_tower.TowerAdam(net.parameters(), lr=1e-3)
    scaler = torch.amp.GradScaler("cpu", init_scale=2.0**16)
    for step in range(steps):
        optimizer.zero_grad()
        with torch.autocast("cpu", dtype=torch.bfloat16):
            loss = _data.loss(net, step)
        scaler.scale(loss).backward()
        if step == steps // 2:
            next(net.parameters()).grad.fill_(float("inf"))  # simulate an overflow: GradScaler skips this step
        scaler.step(optimizer)
        scaler.update()
    taken = int(optimizer.param_groups[0]["tower"]["step"])
    print(f"final loss {loss.item():.4f}; steps taken by the tower {taken} of {steps} (one overflow skipped)")
    print(f"learned step sizes (float64): {optimizer.step_sizes()[0]}")


if __name__ == "__main__":
    main()
