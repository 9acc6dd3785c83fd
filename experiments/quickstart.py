"""The main demo: type any learning rate, train anyway.

Trains the same small network on scikit-learn's bundled 8x8 digits with ``torch.optim.Adam``
and with ``stepsize_tower.TowerAdam`` from initial learning rates six orders of magnitude
apart, same seed and same minibatches, and prints the final training loss of each and the
step size the tower learned. Runs in well under a minute on two CPU cores::

    make demo            # or: python experiments/quickstart.py [--task mlp_digits] [--steps 300]
"""

from __future__ import annotations

import argparse
import time

import torch

from stepsize_tower import TowerAdam
from stepsize_tower.tasks import get_task, task_names, train

LEARNING_RATES = (1e-6, 1e-4, 1e-2, 1.0)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--task", default="mlp_digits", choices=task_names())
    parser.add_argument("--steps", type=int, default=None, help="optimizer steps (default: the task's budget)")
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    torch.set_num_threads(1)

    spec = get_task(args.task)
    print(f"task: {spec.name} ({spec.description}), seed {args.seed}")
    print(f"{'initial lr':>10} | {'torch.optim.Adam':>16} | {'TowerAdam':>9} | {'learned lr':>10} | seconds")
    print(f"{'-' * 10}-+-{'-' * 16}-+-{'-' * 9}-+-{'-' * 10}-+--------")
    for lr in LEARNING_RATES:
        start = time.perf_counter()
        fixed_task = spec.build(args.seed)
        steps = args.steps or fixed_task.default_steps
        fixed = train(fixed_task, torch.optim.Adam(fixed_task.model.parameters(), lr=lr), steps)
        tower_task = spec.build(args.seed)
        optimizer = TowerAdam(tower_task.model.parameters(), lr=lr)
        tower = train(tower_task, optimizer, steps)
        learned = optimizer.step_sizes()[0][0]
        seconds = time.perf_counter() - start
        print(f"{lr:>10.0e} | {fixed.final_loss:>16.4f} | {tower.final_loss:>9.4f} | {learned:>10.2e} | {seconds:6.1f}")
    print("\nFinal training loss on the whole training set (lower is better).")


if __name__ == "__main__":
    main()
