"""The executor interface: what the sweep asks of whatever runs its trials (:mod:`.executors`)."""

from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Callable, Sequence
from types import TracebackType
from typing import Any

from .execute import TrialJob
from .pool import Progress

__all__ = ["Executor", "ExecutorError", "OnRecord", "Record"]

Record = dict[str, Any]
#: Receives each record in the sweep's process as its trial finishes.
OnRecord = Callable[[Record], None]


class ExecutorError(Exception):
    """An executor cannot start (an extra is not installed, a scheduler cannot be reached).

    Attributes:
        key: the ``resources`` key to fix (``executor`` or ``address``).
    """

    def __init__(self, message: str, key: str = "executor") -> None:
        super().__init__(message)
        self.key = key


class Executor(ABC):
    """Runs trial jobs somewhere and reports every record as its trial finishes.

    Used as a context manager around :meth:`run`: ``__enter__`` acquires what the executor
    needs (a connection, say) and raises :class:`ExecutorError` when it cannot; ``__exit__``
    releases it, after Ctrl-C too.
    """

    def __enter__(self) -> Executor:
        return self

    def __exit__(
        self, exc_type: type[BaseException] | None, exc: BaseException | None, tb: TracebackType | None
    ) -> None:
        return None

    @abstractmethod
    def describe(self) -> str:
        """Where the trials run, for the sweep's first line (``"2 workers"``)."""

    def notes(self) -> list[str]:
        """Advice worth a line before the sweep starts (once entered), such as a misconfigured cluster."""
        return []

    @abstractmethod
    def run(self, jobs: Sequence[TrialJob], on_record: OnRecord, progress: Progress | None = None) -> tuple[int, int]:
        """Run ``jobs``, calling ``on_record`` here with each record as soon as its trial finishes.

        Returns ``(ok, failed)``. A trial whose worker stops before returning a record gets
        a failed record (:func:`~.execute.lost_record`). On ``KeyboardInterrupt`` the
        executor stops what it can, drops the trials not yet finished (the next run runs
        them) and re-raises; the records already handed over are kept.
        """
