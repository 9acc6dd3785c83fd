"""A tower under a warm-up + cosine schedule: the schedule scales the learned step size.

python experiments/examples/with_scheduler.py --steps 300
"""

from __future__ import annotations

import argparse

import _data
from torch.optim import lr_scheduler

import stepsize_tower


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--steps", type=int, default=300)
    steps = parser.parse_args().steps
    net = _data.model()
    optimizer = stepsize_tower.TowerAdam(net.parameters(), lr=1e-3)
    warmup = max(1, steps // 10)
    scheduler = lr_scheduler.SequentialLR(
        optimizer,
        [
            lr_scheduler.LinearLR(optimizer, start_factor=0.1, total_iters=warmup),
            lr_scheduler.CosineAnnealingLR(optimizer, T_max=max(1, steps - warmup)),
        ],
        milestones=[warmup],
    )
    for step in range(steps):
        optimizer.zero_grad()
        loss = _data.loss(net, step)
        loss.backward()
        optimizer.step()
        scheduler.step()
        if step % max(1, steps // 5) == 0 or step == steps - 1:
            group = optimizer.param_groups[0]
            print(
                f"step {step:4d} loss {loss.item():.4f}  schedule factor group['lr'] {group['lr']:.2e}"
                f"  step size used {float(group['effective_lr']):.2e}"
            )


if __name__ == "__main__":
    main()
