"""Every level's step size to TensorBoard (or any callable) from a plain script.

python experiments/examples/logging_hook.py --steps 300 --logdir experiments/out/logging_hook
tensorboard --logdir experiments/out/logging_hook
"""

from __future__ import annotations

import argparse

import _data

import stepsize_tower
from stepsize_tower.log_hook import StepSizeLogger


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--steps", type=int, default=300)
    parser.add_argument("--logdir", default="experiments/out/logging_hook")
    args = parser.parse_args()
    net = _data.model()
    optimizer = stepsize_tower.TowerAdam(net.parameters(), lr=1e-4, depth=2)
    try:
        from torch.utils.tensorboard import SummaryWriter

        sink = SummaryWriter(args.logdir)
    except ImportError:  # no tensorboard: print instead
        sink = None
    log = StepSizeLogger(optimizer, sink if sink is not None else (lambda tag, value, step: None))
    for step in range(args.steps):
        optimizer.zero_grad()
        loss = _data.loss(net, step)
        loss.backward()
        optimizer.step()
        log()
    if sink is not None:
        sink.close()
        print(f"wrote stepsize/level{{0,1,2}}/group0 to {args.logdir}")
    for record in log.history[:: max(1, args.steps // 5)]:
        print(f"step {record.step:4d} step sizes (level 0 first) {[f'{a:.2e}' for a in record.step_sizes[0]]}")


if __name__ == "__main__":
    main()
