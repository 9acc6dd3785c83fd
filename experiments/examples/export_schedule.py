"""Export the learned step-size trajectory and replay it on plain torch.optim.SGD, same seed and a new one.

python experiments/examples/export_schedule.py --steps 300
"""

from __future__ import annotations

import argparse

import _data
import torch

import stepsize_tower
from stepsize_tower.log_hook import StepSizeLogger
from stepsize_tower.schedule import LearnedSchedule


def run(optimizer_for, steps: int, seed: int, schedule: LearnedSchedule | None = None):
    net = _data.model(seed)
    optimizer = optimizer_for(net.parameters())
    log = StepSizeLogger(optimizer)
    scheduler = schedule.scheduler(optimizer) if schedule is not None else None
    for step in range(steps):
        optimizer.zero_grad()
        _data.loss(net, step, seed).backward()
        optimizer.step()
        if scheduler is not None:
            scheduler.step()
        log()
    final = sum(_data.loss(net, 10**6 + i, seed).item() for i in range(8)) / 8
    return net, final, log


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--steps", type=int, default=300)
    parser.add_argument("--out", default="experiments/out/learned_schedule.json")
    steps = parser.parse_args().steps
    out = parser.parse_args().out

    def tower(ps):
        return stepsize_tower.TowerSGD(ps, lr=1e-3, retreat=False)

    def plain(ps):
        return torch.optim.SGD(ps, lr=0.0)  # lr is set by the replayed schedule

    net, tower_loss, log = run(tower, steps, seed=0)
    path = log.schedule(meta={"seed": 0}).save(out)
    schedule = LearnedSchedule.load(path)
    replay, replay_loss, _ = run(plain, steps, seed=0, schedule=schedule)
    diff = max((a - b).abs().max().item() for a, b in zip(net.parameters(), replay.parameters(), strict=True))
    print(
        f"wrote {path} ({schedule.steps} steps, a_0 from {schedule.step_sizes[0][0]:.2e} "
        f"to {schedule.step_sizes[0][-1]:.2e})"
    )
    print(f"seed 0: tower held-out loss {tower_loss:.4f}, replay {replay_loss:.4f}, max weight difference {diff:.2e}")
    for seed in (1, 2):
        _, t, _ = run(tower, steps, seed)
        _, r, _ = run(plain, steps, seed, schedule)
        _, f, _ = run(lambda ps: torch.optim.SGD(ps, lr=1e-3), steps, seed)
        print(f"new seed {seed}: tower {t:.4f}, replayed schedule {r:.4f}, fixed SGD at the typed lr {f:.4f}")


if __name__ == "__main__":
    main()
