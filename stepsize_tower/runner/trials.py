"""Expand a recipe's grid into trials, each with a stable id derived from what it runs.

A trial is one optimizer configuration at one depth, initial step size, seed and choice of
swept options. Its id is a hash of everything that determines its result (the task section,
the optimizer and the grid point, not the resources), so the same recipe always gives the
same ids, and editing the task or an option gives new ones: results are never mixed up.
"""

from __future__ import annotations

import dataclasses
import hashlib
import itertools
import json
import re
from dataclasses import dataclass
from typing import Any

from .schema import Recipe

__all__ = ["Trial", "expand_trials"]


@dataclass(frozen=True)
class Trial:
    """One point of the sweep.

    Attributes:
        trial_id: 12 hex digits, stable for the same task, configuration and grid point.
        optimizer: the configuration's label.
        kind: ``tower`` or ``fixed``.
        base: the tower base or ``torch.optim`` class name.
        depth: tower depth (0 for fixed-rate configurations).
        lr: initial step size.
        seed: data, initialization and minibatch seed.
        options: constructor arguments (the configuration's and the swept ones).
        swept: the swept option values alone (``{}`` without ``sweep.options``).
        schedule: the schedule section as a mapping, or None.
    """

    trial_id: str
    optimizer: str
    kind: str
    base: str
    depth: int
    lr: float
    seed: int
    options: dict[str, Any]
    swept: dict[str, Any]
    schedule: dict[str, Any] | None

    @property
    def run_name(self) -> str:
        """A readable, unique folder name for this trial's TensorBoard run."""
        extra = "".join(f"-{k}{v}" for k, v in self.swept.items())
        name = f"{self.optimizer}-d{self.depth}-lr{self.lr:.3g}-s{self.seed}{extra}-{self.trial_id[:6]}"
        return re.sub(r"[^\w.+-]", "_", name)

    def config(self) -> dict[str, Any]:
        """The trial as plain data (stored with its result)."""
        return dataclasses.asdict(self)


def _trial_id(task: dict[str, Any], point: dict[str, Any]) -> str:
    blob = json.dumps({"task": task, "point": point}, sort_keys=True, default=str)
    return hashlib.sha256(blob.encode()).hexdigest()[:12]


def expand_trials(recipe: Recipe) -> list[Trial]:
    """Every trial of ``recipe``, in grid order: configuration, depth, swept options, lr, seed."""
    task = dataclasses.asdict(recipe.task)
    sweep = recipe.sweep
    keys = list(sweep.options)
    combos = [dict(zip(keys, values, strict=True)) for values in itertools.product(*sweep.options.values())]
    trials: list[Trial] = []
    for opt in recipe.optimizers:
        depths = [0] if opt.kind == "fixed" else (opt.depths or sweep.depths)
        schedule = dataclasses.asdict(opt.schedule) if opt.schedule is not None else None
        for depth in depths:
            for swept in combos:
                options = {**opt.options, **swept}
                for lr in sweep.lrs():
                    for seed in sweep.seeds:
                        point = {
                            "optimizer": opt.label,
                            "kind": opt.kind,
                            "base": opt.base,
                            "depth": depth,
                            "lr": lr,
                            "seed": seed,
                            "options": options,
                            "schedule": schedule,
                        }
                        trials.append(
                            Trial(
                                trial_id=_trial_id(task, point),
                                optimizer=opt.label,
                                kind=opt.kind,
                                base=opt.base,
                                depth=depth,
                                lr=lr,
                                seed=seed,
                                options=options,
                                swept=swept,
                                schedule=schedule,
                            )
                        )
    return trials
