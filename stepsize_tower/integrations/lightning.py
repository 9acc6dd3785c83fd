"""A PyTorch Lightning callback that logs every level's step size (needs the ``lightning`` extra).

Lightning's ``LearningRateMonitor`` reads ``group["lr"]``; with a tower that is the
scheduler's outer factor (``lr`` as typed, times the schedule). Add this callback to see the
step size actually used::

    trainer = lightning.Trainer(callbacks=[LearningRateMonitor(), StepSizeMonitor()], ...)

After every optimizer step it logs, to every logger of the trainer, at ``trainer.global_step``:
``stepsize/level{k}/group{i}`` for each level ``k`` (level 0 = the step size used, the same
value as ``group["effective_lr"]``) of each group ``i`` of each optimizer (a suffix
``/opt{j}`` when there are several). Its :attr:`StepSizeMonitor.loggers` keep the history:
``monitor.loggers[0].schedule()`` is the learned schedule to export.
"""

from __future__ import annotations

from typing import Any

try:
    from lightning.pytorch.callbacks import Callback
except ImportError as exc:  # pragma: no cover - exercised only without the extra
    raise ImportError(
        "stepsize_tower.integrations.lightning needs PyTorch Lightning: pip install 'stepsize_tower[lightning]'"
    ) from exc

from ..log_hook import StepSizeLogger

__all__ = ["StepSizeMonitor"]


class StepSizeMonitor(Callback):
    """Log every level's step size of every optimizer after each optimizer step.

    Args:
        prefix: the first part of every metric name (default ``"stepsize"``).
    """

    def __init__(self, prefix: str = "stepsize") -> None:
        super().__init__()
        self.prefix = prefix
        self.loggers: list[StepSizeLogger] = []
        self._metrics: dict[str, float] = {}
        self._last_step = 0

    def _collect(self, tag: str, value: float, step: int) -> None:
        self._metrics[tag] = value

    def on_train_start(self, trainer: Any, pl_module: Any) -> None:
        optimizers = list(trainer.optimizers)
        self.loggers = [
            StepSizeLogger(opt, self._collect, prefix=self.prefix if len(optimizers) == 1 else f"{self.prefix}/opt{j}")
            for j, opt in enumerate(optimizers)
        ]
        self._last_step = trainer.global_step

    def on_train_batch_end(self, trainer: Any, pl_module: Any, outputs: Any, batch: Any, batch_idx: int) -> None:
        if trainer.global_step == self._last_step:
            return  # accumulating gradients: no optimizer step in this batch
        self._last_step = trainer.global_step
        self._metrics = {}
        for log in self.loggers:
            log(trainer.global_step)
        for logger in trainer.loggers:
            logger.log_metrics(self._metrics, step=trainer.global_step)
