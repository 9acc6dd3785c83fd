"""Report the step size in use to code that reads ``scheduler.get_last_lr()`` (the Hugging Face Trainer).

The Trainer logs ``learning_rate = lr_scheduler.get_last_lr()[0]``. With a tower that value is
``group["lr"]``, the scheduler's outer factor, not the step size used. Wrap the scheduler::

    optimizer = stepsize_tower.TowerAdamW(model.parameters(), lr=1e-3)
    schedule = transformers.get_linear_schedule_with_warmup(optimizer, 10, 1000)
    trainer = transformers.Trainer(..., optimizers=(optimizer, EffectiveLRScheduler(schedule)))

Now ``learning_rate`` in the Trainer's logs is ``group["effective_lr"]`` of each group (the
schedule's factor times the learned step size, as used by the last step). Everything else
(``step``, ``state_dict``, ``load_state_dict``, ``last_epoch``, ...) is the wrapped scheduler's.
This module does not import ``transformers``: the wrapper works with any loop.
"""

from __future__ import annotations

from typing import Any

from ..tower import EFFECTIVE_LR_KEY

__all__ = ["EffectiveLRScheduler", "effective_lrs"]


def effective_lrs(optimizer: Any) -> list[float]:
    """Per group, the level-0 step size in use (``group["lr"]`` before a tower's first step).

    Reads device memory once per group: for logging.
    """
    out = []
    for group in optimizer.param_groups:
        value = group.get(EFFECTIVE_LR_KEY, group["lr"])
        out.append(float(value))
    return out


class EffectiveLRScheduler:
    """Wrap any ``torch.optim.lr_scheduler`` so ``get_last_lr()`` returns the step sizes in use.

    Args:
        scheduler: the scheduler that owns ``group["lr"]`` (the outer factor).
    """

    def __init__(self, scheduler: Any) -> None:
        self.scheduler = scheduler

    @property
    def optimizer(self) -> Any:
        """The wrapped scheduler's optimizer."""
        return self.scheduler.optimizer

    def step(self, *args: Any, **kwargs: Any) -> None:
        """Step the wrapped scheduler."""
        self.scheduler.step(*args, **kwargs)

    def get_last_lr(self) -> list[float]:
        """Per group, the level-0 step size in use (``group["effective_lr"]``)."""
        return effective_lrs(self.scheduler.optimizer)

    def state_dict(self) -> dict[str, Any]:
        """The wrapped scheduler's state."""
        return dict(self.scheduler.state_dict())

    def load_state_dict(self, state_dict: dict[str, Any]) -> None:
        """Restore the wrapped scheduler's state."""
        self.scheduler.load_state_dict(state_dict)

    def __getattr__(self, name: str) -> Any:
        if name == "scheduler":
            raise AttributeError(name)
        return getattr(self.scheduler, name)
