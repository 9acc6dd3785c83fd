"""Record the level-0 hypergradient while the step size is held fixed (a diagnosis, not a benchmark).

What it measures
    For one task and a few fixed step sizes ``a``, TowerAdam runs with a level whose step
    size is negligible (so ``a`` stays put) and no retreats; after every step the stored
    hypergradient ``ĥ_1`` (``group["tower"]["hypergrad"]``) is read. Per window of steps it
    prints the mean of ``ĥ_1`` and the share of steps with ``ĥ_1 > 0`` (positive = the tower
    would shrink the step size, negative = grow it), and the final training loss. A step size
    where the late windows show no clear sign is where a learned step size can come to rest.

    The README's account of least squares with raw features under Adam comes from this:
    ``python experiments/hypergradient_record.py --task lsq_raw``.

How to run
    .venv/bin/python experiments/hypergradient_record.py [--task lsq_raw] [--seed 0] [--horizon 0.99]
    About 10 seconds per task on one core.
"""

from __future__ import annotations

import argparse
import statistics
from collections.abc import Sequence

import torch

from stepsize_tower import Level, TowerAdam
from stepsize_tower.tasks import get_task, task_names, train

STEP_SIZES = (3e-3, 1e-2, 3e-2, 1e-1, 3e-1)
WINDOWS = ((1, 51), (50, 100), (150, 200), (250, 300))


def record(task_name: str, a: float, seed: int, horizon: float) -> tuple[float, list[float]]:
    """Final training loss and the hypergradient of every step, with the step size held at ``a``."""
    task = get_task(task_name).build(seed)
    frozen = [Level(kind="sgd", lr=1e-300)]  # learns nothing: a stays at its initial value
    opt = TowerAdam(task.model.parameters(), lr=a, levels=frozen, retreat=False, horizon=horizon)
    hypergrads: list[float] = []

    def on_step(step: int, loss: float) -> None:
        hypergrads.append(float(opt.param_groups[0]["tower"]["hypergrad"][0, 0]))

    result = train(task, opt, task.default_steps, on_step=on_step)
    return result.final_loss, hypergrads


def main(argv: Sequence[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--task", default="lsq_raw", choices=task_names())
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--horizon", type=float, default=0.99)
    args = ap.parse_args(argv)
    torch.set_num_threads(1)
    header = " | ".join(f"steps {lo}-{hi}: mean, share > 0" for lo, hi in WINDOWS)
    print(f"| a | final loss | {header} |")
    print("|---" * (2 + len(WINDOWS)) + "|")
    for a in STEP_SIZES:
        loss, hs = record(args.task, a, args.seed, args.horizon)
        cells = []
        for lo, hi in WINDOWS:
            window = hs[lo:hi]
            share = sum(1 for h in window if h > 0) / max(len(window), 1)
            cells.append(f"{statistics.mean(window):+.2e}, {share:.2f}")
        print(f"| {a:g} | {loss:.4g} | " + " | ".join(cells) + " |")


if __name__ == "__main__":
    main()
