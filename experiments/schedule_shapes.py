"""The tower under the schedules practitioners use, against the same schedule tuned over an lr grid.

Each schedule is the outer factor on the tower's learned step size, as in a training script
that keeps its schedule and drops the lr search:

* ``onecycle`` with Adam: ``torch.optim.lr_scheduler.OneCycleLR`` (its defaults: 30 % warm-up
  from lr/25, cosine down to lr/25/1e4), the tower typed 1e-6 … 1;
* ``multistep`` with SGD (momentum 0.9): ``MultiStepLR`` ×0.1 at 50 % and 75 % of the steps,
  the tower typed 1e-3 … 1e3, the baseline grid 1e-7 … 10.

The baseline is ``torch.optim`` with the same schedule over a half-decade lr grid; a run is
good under the 5 % normalized gap against the best baseline of its task, schedule and seed
(``L <= L_best + 0.05 (L_init - L_best)``), on the training loss and, beside it, on the
held-out loss. Two tower variants: the library as it is (while a schedule anneals ``lr``,
level 1 makes a tenth of each lowering move, ``stepsize_tower.schedule_anneal``) and the
same with that hold-back off.

    python experiments/schedule_shapes.py --seeds 0 1 --tasks mlp_digits cnn_digits
"""

from __future__ import annotations

import argparse
import math
from typing import Any

import torch

from stepsize_tower import TowerAdam, TowerSGD
from stepsize_tower.tasks import get_task
from stepsize_tower.tasks.train import train

GAP = 0.05
SCHEDULES = ("onecycle", "multistep")


def _scheduler(name: str, opt: torch.optim.Optimizer, steps: int) -> Any:
    if name == "onecycle":
        return torch.optim.lr_scheduler.OneCycleLR(opt, max_lr=opt.param_groups[0]["lr"], total_steps=steps)
    return torch.optim.lr_scheduler.MultiStepLR(opt, milestones=[steps // 2, 3 * steps // 4], gamma=0.1)


def _optimizer(schedule: str, tower: bool, params: Any, lr: float) -> torch.optim.Optimizer:
    if schedule == "onecycle":
        return (TowerAdam if tower else torch.optim.Adam)(params, lr=lr)
    return (TowerSGD if tower else torch.optim.SGD)(params, lr=lr, momentum=0.9)


def _grids(schedule: str) -> tuple[list[float], list[float]]:
    """(baseline lrs at half decades, typed tower lrs at decades)."""
    lo, hi = (-5, 0) if schedule == "onecycle" else (-7, 1)  # raw features need SGD rates to 1e-7
    baseline = [10.0 ** (k / 2) for k in range(2 * lo, 2 * hi + 1)]
    typed = [10.0**k for k in range(-6, 1)] if schedule == "onecycle" else [10.0**k for k in range(-3, 4)]
    return baseline, typed


def run_one(task_name: str, schedule: str, seed: int, lr: float, method: str) -> dict[str, Any]:
    """One run; ``method`` is ``baseline``, ``tower`` or ``tower_off`` (the hold-back off)."""
    task = get_task(task_name).build(seed)
    steps = task.default_steps
    opt = _optimizer(schedule, method != "baseline", task.model.parameters(), lr)
    if method == "tower_off":
        for group in opt.param_groups:
            group["schedule_hold_back"] = 1.0
    sched = _scheduler(schedule, opt, steps)
    res = train(task, opt, steps, scheduler=sched)
    held = task.test_loss(task.model) if not res.diverged else math.inf
    return {"init": res.initial_loss, "train": res.final_loss, "held": held, "diverged": res.diverged}


def _good(loss: float, init: float, best: float) -> bool:
    return math.isfinite(loss) and loss <= best + GAP * (init - best)


def study(task_name: str, schedule: str, seed: int) -> dict[str, Any]:
    """Baseline grid, then both tower variants over the typed lrs; good counts and ranges."""
    baseline_lrs, typed = _grids(schedule)
    base = [run_one(task_name, schedule, seed, lr, "baseline") for lr in baseline_lrs]
    finite = [r for r in base if math.isfinite(r["train"])]
    if not finite:
        raise SystemExit(f"{task_name} / {schedule} / seed {seed}: every baseline lr diverged; widen the grid")
    best_train = min(r["train"] for r in finite)
    best_held = min(r["held"] for r in finite)
    init = base[0]["init"]
    out: dict[str, Any] = {"best_train": best_train, "best_held": best_held}
    for method in ("tower", "tower_off"):
        runs = [run_one(task_name, schedule, seed, lr, method) for lr in typed]
        out[method] = {
            "good": sum(_good(r["train"], init, best_train) for r in runs),
            "good_held": sum(_good(r["held"], init, best_held) for r in runs),
            "points": len(runs),
            "train": [r["train"] for r in runs],
        }
    return out


def _fmt(losses: list[float]) -> str:
    return f"{min(losses):.3g} … {max(losses):.3g}"


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, nargs="+", default=[0, 1])
    parser.add_argument("--tasks", nargs="+", default=["mlp_digits", "cnn_digits"])
    parser.add_argument("--schedules", nargs="+", choices=SCHEDULES, default=list(SCHEDULES))
    args = parser.parse_args(argv)
    torch.set_num_threads(1)
    print(
        "| task | schedule | seed | best baseline train / held-out | tower good (train / held-out) "
        "| hold-back off | tower train | off train |"
    )
    print("|---|---|---|---|---|---|---|---|")
    for task_name in args.tasks:
        for schedule in args.schedules:
            for seed in args.seeds:
                r = study(task_name, schedule, seed)
                on, off = r["tower"], r["tower_off"]
                print(
                    f"| {task_name} | {schedule} | {seed} | {r['best_train']:.3g} / {r['best_held']:.3g} "
                    f"| {on['good']}/{on['points']} / {on['good_held']}/{on['points']} "
                    f"| {off['good']}/{off['points']} / {off['good_held']}/{off['points']} "
                    f"| {_fmt(on['train'])} | {_fmt(off['train'])} |",
                    flush=True,
                )


if __name__ == "__main__":
    main()
