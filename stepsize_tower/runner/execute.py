"""Run one trial: build the task from its seed, build the optimizer, train, log, return a record.

The record is plain JSON data (see :func:`run_trial`); any exception inside the trial is
caught and returned as a failed record with its traceback, so one broken trial never stops
a sweep.
"""

from __future__ import annotations

import math
import os
import shutil
import time
import traceback
from collections.abc import Sequence
from dataclasses import asdict, dataclass, field
from typing import Any

import torch
from torch.optim import Optimizer

from ..tasks.base import TaskInstance
from ..tasks.train import train
from ..tower import TowerOptimizer
from .build import build_optimizer, build_schedule, build_task, resolve_steps
from .schema import ScheduleConfig, TaskConfig
from .trials import Trial

__all__ = ["TrialJob", "current_step_sizes", "lost_record", "run_trial", "stepsize_tag"]

Record = dict[str, Any]


@dataclass(frozen=True)
class TrialJob:
    """Everything a worker process needs to run one trial (picklable).

    Attributes:
        trial: the grid point.
        task: the recipe's task section.
        search_path: folders searched first for a user task module.
        log_dir: this trial's TensorBoard run folder (None: no TensorBoard logging).
        log_every: steps between logged step sizes and minibatch losses.
        threads: torch threads in the worker.
        metrics: extra metrics to report besides the train and test losses.
    """

    trial: Trial
    task: TaskConfig
    search_path: Sequence[str] = ()
    log_dir: str | None = None
    log_every: int = 10
    threads: int = 1
    metrics: Sequence[str] = field(default_factory=tuple)


def current_step_sizes(optimizer: Optimizer) -> list[list[float]]:
    """Per parameter group, ``[a_0, ..., a_D]`` for a tower, ``[lr]`` for a ``torch.optim`` optimizer."""
    if isinstance(optimizer, TowerOptimizer):
        return optimizer.step_sizes()
    return [[float(g["lr"])] for g in optimizer.param_groups]


def stepsize_tag(level: int, group: int, groups: int) -> str:
    """The TensorBoard tag of a step size: ``stepsize/level{k}``, with ``/group{i}`` when there are several."""
    return f"stepsize/level{level}" + (f"/group{group}" if groups > 1 else "")


def _finite(x: float) -> float | None:
    return x if math.isfinite(x) else None


class _Logger:
    """Step-size trajectory (kept for the record) and TensorBoard scalars."""

    def __init__(self, job: TrialJob, optimizer: Optimizer) -> None:
        self.optimizer = optimizer
        self.every = job.log_every
        self.trajectory: list[dict[str, Any]] = []
        self.writer: Any = None
        if job.log_dir is not None:
            from torch.utils.tensorboard import SummaryWriter

            shutil.rmtree(job.log_dir, ignore_errors=True)  # a retried trial starts a clean run
            self.writer = SummaryWriter(job.log_dir)

    def step_sizes(self, step: int) -> None:
        sizes = current_step_sizes(self.optimizer)
        self.trajectory.append({"step": step, "step_sizes": sizes})
        if self.writer is not None:
            for g, levels in enumerate(sizes):
                for k, a in enumerate(levels):
                    self.writer.add_scalar(stepsize_tag(k, g, len(sizes)), a, step)

    def scalar(self, tag: str, value: float, step: int) -> None:
        if self.writer is not None and math.isfinite(value):
            self.writer.add_scalar(tag, value, step)

    def on_step(self, step: int, loss: float) -> None:
        if step % self.every == 0:
            self.step_sizes(step)
            self.scalar("loss/train_batch", loss, step)

    def layout(self, levels: int, groups: int) -> None:
        if self.writer is None:
            return
        charts = {
            "all levels" + (f", group {g}" if groups > 1 else ""): [
                "Multiline",
                [rf"^stepsize/level\d+{'/group' + str(g) if groups > 1 else ''}$"],
            ]
            for g in range(groups)
        }
        self.writer.add_custom_scalars(
            {"step sizes": charts, "losses": {"train and test": ["Multiline", [r"^loss/(train|test)$"]]}}
        )


def _hparams(trial: Trial) -> dict[str, Any]:
    h: dict[str, Any] = {
        "optimizer": trial.optimizer,
        "kind": trial.kind,
        "base": trial.base,
        "depth": trial.depth,
        "lr": trial.lr,
        "seed": trial.seed,
    }
    for k, v in trial.options.items():
        h[f"option/{k}"] = v if isinstance(v, int | float | str | bool) else str(v)
    return h


#: The clock of ``setup_seconds`` and ``wall_seconds`` (a seam for tests).
_clock = time.perf_counter


def _initial_test_loss(task: TaskInstance) -> float:
    """The held-out loss of the fresh model, leaving the global RNG as it was (the run stays bitwise the same)."""
    with torch.random.fork_rng(devices=[]):
        return float(task.test_loss(task.model))


def _train(job: TrialJob, record: Record, start: float) -> None:
    trial = job.trial
    torch.manual_seed(trial.seed)
    task = build_task(job.task, trial.seed, job.search_path)
    steps = resolve_steps(job.task, task)
    optimizer = build_optimizer(trial.kind, trial.base, task.model.parameters(), trial.lr, trial.depth, trial.options)
    schedule = build_schedule(ScheduleConfig(**trial.schedule) if trial.schedule else None, optimizer, steps)
    log = _Logger(job, optimizer)
    sizes = current_step_sizes(optimizer)
    log.layout(len(sizes[0]), len(sizes))
    log.step_sizes(0)
    initial_test = _initial_test_loss(task)
    evaluate_every = job.task.eval_every

    def on_step(step: int, loss: float) -> None:
        log.on_step(step, loss)
        if evaluate_every and step % evaluate_every == 0 and step < steps:
            log.scalar("loss/train", task.full_train_loss(task.model), step)
            log.scalar("loss/test", task.test_loss(task.model), step)

    record["setup_seconds"] = _clock() - start
    result = train(task, optimizer, steps, scheduler=schedule, on_step=on_step)
    if result.steps % job.log_every:
        log.step_sizes(result.steps)
    metrics: dict[str, float | None] = {
        "train_loss": _finite(result.final_loss),
        "test_loss": None if result.diverged else _finite(task.test_loss(task.model)),
    }
    for name in job.metrics:
        if name not in metrics:
            metrics[name] = None if result.diverged else _finite(float(task.metrics[name](task.model)))
    log.scalar("loss/train", result.initial_loss, 0)
    log.scalar("loss/test", initial_test, 0)
    for name, value in metrics.items():
        tag = f"loss/{name.removesuffix('_loss')}" if name.endswith("_loss") else f"metrics/{name}"
        if value is not None:
            log.scalar(tag, value, result.steps)
    tower = optimizer if isinstance(optimizer, TowerOptimizer) else None
    record.update(
        steps=steps,
        steps_done=result.steps,
        initial_loss=_finite(result.initial_loss),
        initial_metrics={"train_loss": _finite(result.initial_loss), "test_loss": _finite(initial_test)},
        metrics=metrics,
        diverged=result.diverged,
        train_seconds=result.seconds,
        final_step_sizes=current_step_sizes(optimizer),
        trajectory=log.trajectory,
        retreats=tower.retreats() if tower is not None else 0,
        skipped_steps=tower.skipped_steps() if tower is not None else 0,
    )
    if log.writer is not None:
        hp_metrics = {f"hparam/{k}": (v if v is not None else float("nan")) for k, v in metrics.items()}
        log.writer.add_hparams(_hparams(trial), hp_metrics, run_name=".")
        log.writer.close()


def run_trial(job: TrialJob) -> Record:
    """Run ``job`` and return its record; never raises for a failure inside the trial.

    The record holds ``trial_id``, ``status`` (``ok`` or ``failed``), ``trial`` (the resolved
    grid point), ``task`` (the task section), ``metrics`` (``train_loss``, ``test_loss`` and
    the recipe's extra metrics; ``None`` when not finite), ``initial_metrics``
    (``train_loss`` and ``test_loss`` of the seed's model before the first step, the
    ``L_init`` of the normalized-gap rule), ``initial_loss`` (the same training loss),
    ``diverged``, ``steps``, ``steps_done``, ``final_step_sizes`` and ``trajectory`` (step
    sizes every ``log_every`` steps, per group, level 0 first), ``retreats``,
    ``skipped_steps``, ``error`` (the traceback of a failed trial), ``log_dir`` and three
    times in seconds:

    - ``setup_seconds``: building the task, optimizer, schedule and logger and the initial
      held-out loss; a worker's first trial pays its imports and data loading here
      (``None`` when the trial failed before training);
    - ``wall_seconds``: the trial's own run, from the end of setup to the finished record
      (training, final evaluation, logging); the whole time when setup failed;
    - ``train_seconds``: the training steps alone.
    """
    torch.set_num_threads(job.threads)
    start = _clock()
    record: Record = {
        "trial_id": job.trial.trial_id,
        "status": "ok",
        "trial": job.trial.config(),
        "task": asdict(job.task),
        "log_dir": job.log_dir,
        "error": None,
        "pid": os.getpid(),
    }
    record["setup_seconds"] = None
    try:
        _train(job, record, start)
    except Exception:
        record["status"] = "failed"
        record["error"] = traceback.format_exc()
    setup = record["setup_seconds"]
    record["wall_seconds"] = _clock() - start - (setup or 0.0)
    record["finished_at"] = time.time()
    return record


def lost_record(job: TrialJob, reason: str, exc: BaseException) -> Record:
    """The failed record of a trial whose worker stopped before returning one (killed, out of memory, lost).

    ``reason`` says which worker, such as ``"the worker process running this trial stopped"``;
    the exception that reported it follows.
    """
    return {
        "trial_id": job.trial.trial_id,
        "status": "failed",
        "trial": job.trial.config(),
        "error": f"{reason}: {type(exc).__name__}: {exc}",
        "setup_seconds": None,
        "wall_seconds": None,
        "finished_at": time.time(),
    }
