"""Run one optimizer on one task instance for a step budget: the shortest honest training loop."""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import torch
from torch.optim import Optimizer

from .base import TaskInstance

__all__ = ["StepCallback", "TrainResult", "train"]

#: ``on_step(step, loss)``: called after optimizer step ``step`` (1-based) with that step's minibatch loss.
StepCallback = Callable[[int, float], None]


@dataclass(frozen=True)
class TrainResult:
    """The outcome of one training run.

    Attributes:
        initial_loss: ``full_train_loss`` before the first step.
        final_loss: ``full_train_loss`` after the last step (``nan``/``inf`` when diverged).
        diverged: the final loss or the weights are not finite.
        steps: optimizer steps taken (fewer than asked when the weights became non-finite).
        seconds: wall time of the training steps (evaluations excluded).
    """

    initial_loss: float
    final_loss: float
    diverged: bool
    steps: int
    seconds: float


def _weights_finite(model: torch.nn.Module) -> bool:
    return all(bool(torch.isfinite(p).all()) for p in model.parameters())


def train(
    task: TaskInstance,
    optimizer: Optimizer,
    steps: int,
    *,
    scheduler: Any | None = None,
    on_step: StepCallback | None = None,
) -> TrainResult:
    """Take ``steps`` optimizer steps on ``task.model`` with ``task.batches()``.

    A non-finite minibatch loss is handed to the optimizer like any other (a safeguarded
    optimizer may skip it); the run stops early only once the weights themselves are no
    longer finite.

    Args:
        task: the task instance (its model is trained in place).
        optimizer: any ``torch.optim.Optimizer``.
        steps: the step budget.
        scheduler: an optional ``torch.optim.lr_scheduler`` object, stepped after every
            optimizer step.
        on_step: an optional callback ``on_step(step, loss)`` run after every step (and
            after the scheduler); its time counts in ``seconds``.
    """
    model = task.model
    initial = task.full_train_loss(model)
    model.train()
    batches = task.batches()
    done = 0
    start = time.perf_counter()
    for _ in range(steps):
        optimizer.zero_grad(set_to_none=True)
        loss = task.loss_fn(model, next(batches))
        loss.backward()
        optimizer.step()
        if scheduler is not None:
            scheduler.step()
        done += 1
        value = loss.item()
        if on_step is not None:
            on_step(done, value)
        if not math.isfinite(value) and not _weights_finite(model):
            break
    seconds = time.perf_counter() - start
    final = task.full_train_loss(model) if _weights_finite(model) else math.nan
    return TrainResult(
        initial_loss=initial,
        final_loss=final,
        diverged=not math.isfinite(final),
        steps=done,
        seconds=seconds,
    )
