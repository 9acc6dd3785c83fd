"""Log every level's step size from any training loop, and keep the trajectory for export.

Call a :class:`StepSizeLogger` after every ``optimizer.step()`` (and after the scheduler, if
any)::

    from torch.utils.tensorboard import SummaryWriter
    from stepsize_tower.log_hook import StepSizeLogger

    log = StepSizeLogger(optimizer, SummaryWriter("runs/mine"))
    for batch in batches:
        ...; optimizer.step(); scheduler.step()
        log()                                   # or log(step=global_step)
    log.schedule().save("learned_schedule.json")

What is logged per call and group ``i`` (tags as written to the sink):

- ``stepsize/level0/group{i}``: the level-0 step size the call used (``group["effective_lr"]``,
  the product of the scheduler's ``group["lr"]`` and the learned factor); for a plain
  ``torch.optim`` optimizer, ``group["lr"]`` as it was when the call ran.
- ``stepsize/level{k}/group{i}`` for ``k = 1..D``: the upper levels' current step sizes
  (``D`` is the fixed top).
- ``loss/train`` when used as ``train(..., on_step=log.on_step)``.

The sink is a ``SummaryWriter`` (anything with ``add_scalar``) or any callable
``sink(tag, value, step)``. Each call reads every step size to the host once: an opt-in
cost for logging, never part of ``step()``.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, Protocol

from torch import Tensor
from torch.optim import Optimizer

from .schedule import LearnedSchedule
from .tower import EFFECTIVE_LR_KEY, TowerOptimizer

__all__ = ["ScalarSink", "StepRecord", "StepSizeLogger"]

#: ``sink(tag, value, step)``: any callable that receives one scalar.
ScalarSink = Callable[[str, float, int], None]


class _ScalarWriter(Protocol):
    def add_scalar(self, tag: str, scalar_value: float, global_step: int | None = None) -> Any: ...


@dataclass(frozen=True)
class StepRecord:
    """What one ``optimizer.step()`` call did, per group.

    Attributes:
        step: the step number given to (or counted by) the logger.
        step_sizes: per group ``[a_0 used by this call, a_1, ..., a_D]``.
        status: per group ``"taken"``, ``"skipped"`` (non-finite gradient, or no gradient at
            all) or ``"retreat"`` (the previous step was redone with ``a_0``).
    """

    step: int
    step_sizes: list[list[float]]
    status: list[str]


def _counters(optimizer: Optimizer) -> list[tuple[float, float, float]]:
    out = []
    for group in optimizer.param_groups:
        ts = group.get("tower")
        out.append((0.0, 0.0, 0.0) if ts is None else (float(ts["step"]), float(ts["skipped"]), float(ts["retreats"])))
    return out


class StepSizeLogger:
    """Write every level's step size to a sink after each step and keep the history.

    Args:
        optimizer: a tower optimizer, or any ``torch.optim.Optimizer`` (then level 0 is its
            ``group["lr"]`` and there are no upper levels).
        sink: a ``SummaryWriter``, a callable ``sink(tag, value, step)``, or ``None`` (keep the
            history only).
        prefix: the first part of every tag (default ``"stepsize"``).
        layout: with a sink that has ``add_custom_scalars``, add once a layout that puts every
            level of every group on one chart.
    """

    def __init__(
        self,
        optimizer: Optimizer,
        sink: _ScalarWriter | ScalarSink | None = None,
        *,
        prefix: str = "stepsize",
        layout: bool = True,
    ) -> None:
        self.optimizer = optimizer
        self.prefix = prefix
        self.history: list[StepRecord] = []
        self._sink = sink
        self._layout = layout
        self._count = 0
        self._last = _counters(optimizer)
        self._lr_before = [group["lr"] for group in optimizer.param_groups]

    def _write(self, tag: str, value: float, step: int) -> None:
        if self._sink is None:
            return
        add_scalar = getattr(self._sink, "add_scalar", None)
        if add_scalar is not None:
            add_scalar(tag, value, step)
        else:
            self._sink(tag, value, step)  # type: ignore[operator]

    def _add_layout(self, depth: int) -> None:
        add_custom_scalars = getattr(self._sink, "add_custom_scalars", None)
        if not self._layout or add_custom_scalars is None:
            return
        charts = {
            f"group {i}": ["Multiline", [rf"{self.prefix}/level\d+/group{i}$"]]
            for i in range(len(self.optimizer.param_groups))
        }
        add_custom_scalars({f"{self.prefix} (every level, depth {depth})": charts})
        self._layout = False

    def _level_values(self) -> list[list[float]]:
        opt = self.optimizer
        if not isinstance(opt, TowerOptimizer):
            return [[float(lr)] for lr in self._lr_before]
        values = opt.step_sizes()
        for i, group in enumerate(opt.param_groups):
            used = group.get(EFFECTIVE_LR_KEY)
            if isinstance(used, Tensor):
                values[i][0] = float(used)
        return values

    def __call__(self, step: int | None = None) -> StepRecord:
        """Record the ``optimizer.step()`` call just made; write it to the sink; return it."""
        self._count += 1
        step = self._count if step is None else step
        now = _counters(self.optimizer)
        status = []
        tower = isinstance(self.optimizer, TowerOptimizer)
        for (s0, _, r0), (s1, _, r1) in zip(self._last, now, strict=True):
            status.append("retreat" if r1 > r0 else "taken" if s1 > s0 or not tower else "skipped")
        self._last = now
        values = self._level_values()
        self._lr_before = [group["lr"] for group in self.optimizer.param_groups]
        self._add_layout(max(len(v) for v in values) - 1)
        for i, group_values in enumerate(values):
            for k, value in enumerate(group_values):
                self._write(f"{self.prefix}/level{k}/group{i}", value, step)
        record = StepRecord(step=step, step_sizes=values, status=status)
        self.history.append(record)
        return record

    def on_step(self, step: int, loss: float) -> None:
        """The ``on_step(step, loss)`` hook of :func:`stepsize_tower.tasks.train`: logs ``loss/train`` too."""
        self._write("loss/train", loss, step)
        self(step)

    def schedule(self, meta: dict[str, Any] | None = None) -> LearnedSchedule:
        """The level-0 trajectory so far as a :class:`LearnedSchedule` (net step size per call)."""
        groups = len(self.optimizer.param_groups)
        sizes: list[list[float]] = [[] for _ in range(groups)]
        status: list[list[str]] = [[] for _ in range(groups)]
        for record in self.history:
            for g in range(groups):
                a0, what = record.step_sizes[g][0], record.status[g]
                if what == "retreat":
                    taken = [i for i, s in enumerate(status[g]) if s == "taken"]
                    if taken:  # the last taken step was redone with a0
                        sizes[g][taken[-1]] = a0
                    a0 = 0.0
                elif what == "skipped":
                    a0 = 0.0
                sizes[g].append(a0)
                status[g].append(what)
        info = {"optimizer": type(self.optimizer).__name__, **(meta or {})}
        return LearnedSchedule(
            step_sizes=tuple(tuple(s) for s in sizes), status=tuple(tuple(s) for s in status), meta=info
        )
