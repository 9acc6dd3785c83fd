"""What a built-in training task is: a model, seeded minibatches, a loss and evaluators.

A :class:`TaskSpec` names a task and builds a fresh :class:`TaskInstance` from a seed.
The same seed gives the same split, the same initial weights and the same sequence of
minibatches, so two optimizers run on two instances built from one seed see identical
data in identical order.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass, field

import torch
from torch import Tensor, nn

__all__ = [
    "Batch",
    "LossFn",
    "TaskInstance",
    "TaskSpec",
    "epoch_batches",
    "seeded_module",
    "split_indices",
    "supervised_instance",
    "whole_set_loss",
]

#: One minibatch: inputs and targets.
Batch = tuple[Tensor, Tensor]

#: ``loss_fn(model, batch) -> scalar loss`` (the minimized objective, mean over the batch).
LossFn = Callable[[nn.Module, Batch], Tensor]


@dataclass
class TaskInstance:
    """One seeded run of a task.

    Attributes:
        name: the task's name.
        model: freshly initialized weights (CPU, float32).
        batches: returns a new, infinite iterator of training minibatches; every call
            yields the same sequence (it is a function of the seed only).
        loss_fn: the training objective on one batch.
        full_train_loss: the objective on the whole training set (or a fixed large
            subset), in eval mode, without gradients; ``nan``/``inf`` when diverged.
        test_loss: the same on held-out data.
        default_steps: the step budget the task was sized for.
        metrics: further evaluators by name (such as ``test_accuracy``), each taking the
            model and returning a float; empty for tasks that have none.
        steps_per_epoch: full minibatches per pass over the training set, when the task
            has a finite training set (None for sampled streams).
    """

    name: str
    model: nn.Module
    batches: Callable[[], Iterator[Batch]]
    loss_fn: LossFn
    full_train_loss: Callable[[nn.Module], float]
    test_loss: Callable[[nn.Module], float]
    default_steps: int
    metrics: dict[str, Callable[[nn.Module], float]] = field(default_factory=dict)
    steps_per_epoch: int | None = None


@dataclass(frozen=True)
class TaskSpec:
    """A named task: ``build(seed)`` gives a fresh :class:`TaskInstance`."""

    name: str
    description: str
    build: Callable[[int], TaskInstance]


def seeded_module(seed: int, make: Callable[[], nn.Module]) -> nn.Module:
    """Build a module with initial weights drawn from ``seed``, leaving the global RNG as it was."""
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(seed)
        return make()


def split_indices(n: int, train_fraction: float, seed: int) -> tuple[Tensor, Tensor]:
    """A seeded random split of ``range(n)`` into train and held-out indices."""
    perm = torch.randperm(n, generator=torch.Generator().manual_seed(seed))
    n_train = round(n * train_fraction)
    return perm[:n_train], perm[n_train:]


def epoch_batches(x: Tensor, y: Tensor, batch_size: int, seed: int) -> Callable[[], Iterator[Batch]]:
    """Shuffled minibatches, epoch after epoch, in an order fixed by ``seed``.

    The last partial batch of each epoch is dropped, so every batch has the same size.
    """
    n = x.shape[0]
    if batch_size > n:
        raise ValueError(f"Invalid batch_size: {batch_size}; the training set has {n} rows")

    def batches() -> Iterator[Batch]:
        gen = torch.Generator().manual_seed(seed + 7919)
        while True:
            perm = torch.randperm(n, generator=gen)
            for start in range(0, n - batch_size + 1, batch_size):
                idx = perm[start : start + batch_size]
                yield x[idx], y[idx]

    return batches


def whole_set_loss(loss_fn: LossFn, x: Tensor, y: Tensor, chunk: int = 4096) -> Callable[[nn.Module], float]:
    """An evaluator: the mean of ``loss_fn`` over ``(x, y)`` in eval mode, without gradients.

    ``loss_fn`` must average over its batch; chunks are weighted by their size.
    """

    def evaluate(model: nn.Module) -> float:
        was_training = model.training
        model.eval()
        total, count = 0.0, 0
        with torch.no_grad():
            for start in range(0, x.shape[0], chunk):
                xb, yb = x[start : start + chunk], y[start : start + chunk]
                total += float(loss_fn(model, (xb, yb))) * xb.shape[0]
                count += xb.shape[0]
        model.train(was_training)
        return total / count

    return evaluate


def supervised_instance(
    name: str,
    model: nn.Module,
    loss_fn: LossFn,
    train: Batch,
    test: Batch,
    *,
    batch_size: int,
    seed: int,
    steps: int = 300,
    metrics: Mapping[str, Callable[[nn.Module], float]] | None = None,
    epochs: bool = False,
) -> TaskInstance:
    """A task on a fixed labelled set: seeded minibatches of ``train``, whole-set losses of both.

    ``epochs`` sets ``steps_per_epoch`` (full minibatches per pass over ``train``), which
    lets a recipe count its budget in epochs; the built-in benchmark tasks leave it unset.
    """
    xs, ys = train
    xt, yt = test
    return TaskInstance(
        name=name,
        model=model,
        batches=epoch_batches(xs, ys, batch_size, seed),
        loss_fn=loss_fn,
        full_train_loss=whole_set_loss(loss_fn, xs, ys),
        test_loss=whole_set_loss(loss_fn, xt, yt),
        default_steps=steps,
        metrics=dict(metrics or {}),
        steps_per_epoch=xs.shape[0] // batch_size if epochs else None,
    )
