"""Run one optimizer on one task instance for a step budget: the shortest honest training loop."""

from __future__ import annotations

import math
import time
from dataclasses import dataclass

import torch
from torch.optim import Optimizer

from .base import TaskInstance

__all__ = ["TrainResult", "train"]


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


def train(task: TaskInstance, optimizer: Optimizer, steps: int) -> TrainResult:
    """Take ``steps`` optimizer steps on ``task.model`` with ``task.batches()``.

    A non-finite minibatch loss is handed to the optimizer like any other (a safeguarded
    optimizer may skip it); the run stops early only once the weights themselves are no
    longer finite.
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
        done += 1
        if not math.isfinite(loss.item()) and not _weights_finite(model):
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
