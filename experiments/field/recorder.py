"""What a run records while it trains: per-step loss and the optimizer's step size."""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import torch

#: ``make_optimizer(params_or_groups, steps) -> (optimizer, scheduler or None)``.
MakeOptimizer = Callable[[Any, int], tuple[torch.optim.Optimizer, Any]]

#: Steps between two samples of the step-size trajectory.
TRAJECTORY_EVERY = 10


def current_step_size(opt: torch.optim.Optimizer) -> float:
    """The step size in use for the first parameter group.

    For a tower, ``step_sizes()[0][0]`` (the learned value times ``group["lr"]``); for a
    ``torch.optim`` optimizer, ``group["lr"]`` (after its scheduler).
    """
    if hasattr(opt, "step_sizes"):
        return float(opt.step_sizes()[0][0])
    return float(opt.param_groups[0]["lr"])


def all_step_sizes(opt: torch.optim.Optimizer) -> list[float]:
    """The step size in use per parameter group."""
    if hasattr(opt, "step_sizes"):
        return [float(s[0]) for s in opt.step_sizes()]
    return [float(g["lr"]) for g in opt.param_groups]


@dataclass
class Recorder:
    """Collects the training-loss curve and the step-size trajectory of one run."""

    losses: list[float] = field(default_factory=list)
    trajectory: list[tuple[int, float]] = field(default_factory=list)
    diverged: bool = False

    def after_step(self, step: int, loss: float, opt: torch.optim.Optimizer) -> bool:
        """Record step ``step`` (0-based); False when training should stop (diverged)."""
        self.losses.append(loss)
        if step % TRAJECTORY_EVERY == 0:
            self.trajectory.append((step, current_step_size(opt)))
        if not math.isfinite(loss):  # a run only counts as diverged (and stops) on inf or nan
            self.diverged = True
        return not self.diverged

    def summary(self, opt: torch.optim.Optimizer) -> dict[str, Any]:
        """Initial loss, final loss (mean of the last 5 % of steps and last batch), step sizes."""
        n = len(self.losses)
        tail = self.losses[-max(1, n // 20) :]
        finite = all(math.isfinite(x) for x in tail)
        return {
            "steps_done": n,
            "initial_loss": self.losses[0] if n else None,
            "final_loss": (sum(tail) / len(tail)) if finite and not self.diverged else None,
            "last_loss": self.losses[-1] if n and math.isfinite(self.losses[-1]) else None,
            "diverged": self.diverged,
            "final_step_size": current_step_size(opt),
            "final_step_sizes": all_step_sizes(opt),
            "trajectory": self.trajectory,
            "retreats": opt.retreats() if hasattr(opt, "retreats") else 0,
            "skipped": opt.skipped_steps() if hasattr(opt, "skipped_steps") else 0,
        }
