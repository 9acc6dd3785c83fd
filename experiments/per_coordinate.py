"""Prototype: Adam with one learned step size per coordinate (a study, not a product feature).

What it measures
    The final training loss over the sensitivity benchmark's initial step sizes (1e-7 … 10)
    for a plain loop (no stepsize_tower optimizer) in which every coordinate ``i`` has its own
    step size ``a_i = lr · exp(u_i)``. ``u_i`` is learned like the tower's level 1 learns the
    group's: an Adam-like level (step 0.05, betas 0.9/0.999) on the per-coordinate trail
    hypergradient ``ĥ_i = -g_i E_i / (1 - γ)``, with ``E`` the moving average (weight
    ``1 - γ``) of the coordinate's recent updates. There are no safeguards (no retreats).

    The README quotes it for least squares with raw features, where one step size per group
    is what limits the tower: ``python experiments/per_coordinate.py --task lsq_raw``.

How to run
    .venv/bin/python experiments/per_coordinate.py [--task lsq_raw] [--seed 0] [--horizon 0.99]
    A few seconds per task on one core for the small tasks.
"""

from __future__ import annotations

import argparse
from collections.abc import Sequence

import torch

from stepsize_tower.tasks import get_task, task_names

LRS = tuple(10.0**k for k in range(-7, 2))
BETA1, BETA2, EPS = 0.9, 0.999, 1e-8
LEVEL_LR = 0.05


def run(task_name: str, lr: float, seed: int, horizon: float) -> float:
    """Train one task from ``lr`` with per-coordinate step sizes; return the final training loss."""
    task = get_task(task_name).build(seed)
    params = list(task.model.parameters())
    f64 = torch.float64
    state = [
        {
            "m": torch.zeros_like(p),
            "v": torch.zeros_like(p),
            "trail": torch.zeros_like(p),
            "u": torch.zeros_like(p, dtype=f64),
            "hm": torch.zeros_like(p, dtype=f64),
            "hv": torch.zeros_like(p, dtype=f64),
        }
        for p in params
    ]
    batches = task.batches()
    for t in range(1, task.default_steps + 1):
        for p in params:
            p.grad = None
        task.loss_fn(task.model, next(batches)).backward()
        with torch.no_grad():
            for p, s in zip(params, state, strict=True):
                g = p.grad
                assert g is not None
                if t > 1:  # the level: Adam-like moments of each coordinate's hypergradient
                    h = -(g.to(f64) * s["trail"].to(f64)) / (1 - horizon)
                    s["hm"].lerp_(h, 1 - BETA1)
                    s["hv"].mul_(BETA2).addcmul_(h, h, value=1 - BETA2)
                    k = t - 1
                    d = (s["hm"] / (1 - BETA1**k)) / ((s["hv"] / (1 - BETA2**k)).sqrt() + 1e-30)
                    s["u"].sub_((LEVEL_LR * d).clamp(-1, 1)).clamp_(-69, 69)
                s["m"].lerp_(g, 1 - BETA1)
                s["v"].mul_(BETA2).addcmul_(g, g, value=1 - BETA2)
                step = (lr * s["u"].exp()).to(p.dtype)
                update = step * (s["m"] / (1 - BETA1**t)) / ((s["v"] / (1 - BETA2**t)).sqrt() + EPS)
                p.sub_(update)
                s["trail"].mul_(horizon).add_(update, alpha=1 - horizon)
    return float(task.full_train_loss(task.model))


def main(argv: Sequence[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--task", default="lsq_raw", choices=task_names())
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--horizon", type=float, default=0.99)
    args = ap.parse_args(argv)
    torch.set_num_threads(1)
    print("| initial lr | " + " | ".join(f"{lr:g}" for lr in LRS) + " |")
    print("|---" * (len(LRS) + 1) + "|")
    losses = [run(args.task, lr, args.seed, args.horizon) for lr in LRS]
    print(f"| final loss ({args.task}) | " + " | ".join(f"{x:.3g}" for x in losses) + " |")


if __name__ == "__main__":
    main()
