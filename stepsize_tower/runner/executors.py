"""Where trials run: the executor interface, the built-in executors and the recipe's choice.

An executor takes picklable :class:`~.execute.TrialJob` s and hands each record to
``on_record`` *in this process* as soon as its trial finishes; the sweep appends it to
``results.jsonl`` at once. Trials, records and resume are therefore the same whatever runs
the trials. The executors (``resources.executor`` in a recipe, ``--executor`` on the
command line):

- ``local`` (the default): spawned worker processes on this machine (:mod:`.pool`);
- ``dask``: one task per trial on a running Dask distributed cluster
  (:mod:`.dask_backend`, optional extra ``stepsize-tower[dask]``).

Any other backend is a subclass of :class:`Executor` passed as ``run_sweep(executor=...)``.
"""

from __future__ import annotations

import os
import typing
from collections.abc import Sequence

from .execute import TrialJob, run_trial
from .executor_api import Executor, ExecutorError, OnRecord
from .pool import Progress, run_pool
from .schema import ExecutorName, LoadedRecipe

__all__ = [
    "EXECUTORS",
    "Executor",
    "ExecutorError",
    "InlineExecutor",
    "LocalExecutor",
    "OnRecord",
    "executor_for",
]

#: The executor names of ``resources.executor`` and ``--executor``.
EXECUTORS: tuple[str, ...] = typing.get_args(ExecutorName)


class LocalExecutor(Executor):
    """Spawned worker processes on this machine (see :func:`~.pool.run_pool`)."""

    def __init__(self, workers: int) -> None:
        if workers < 1:
            raise ValueError(f"expected at least 1 worker, got {workers}")
        self.workers = workers

    def describe(self) -> str:
        return f"{self.workers} worker{'s' if self.workers > 1 else ''}"

    def run(self, jobs: Sequence[TrialJob], on_record: OnRecord, progress: Progress | None = None) -> tuple[int, int]:
        return run_pool(jobs, self.workers, on_record, progress)


class InlineExecutor(Executor):
    """Every trial in this process, one after another (tests and debugging)."""

    def describe(self) -> str:
        return "1 worker"

    def run(self, jobs: Sequence[TrialJob], on_record: OnRecord, progress: Progress | None = None) -> tuple[int, int]:
        ok = failed = 0
        for job in jobs:
            record = run_trial(job)
            on_record(record)
            ok, failed = (ok + 1, failed) if record["status"] == "ok" else (ok, failed + 1)
            if progress:
                progress.update(ok, failed, 0)
        if progress:
            progress.update(ok, failed, 0, final=True)
        return ok, failed


def executor_for(loaded: LoadedRecipe, todo: int, workers: int | None = None, inline: bool = False) -> Executor:
    """The executor that ``loaded`` asks for in ``resources`` (nothing is started yet).

    Args:
        loaded: a checked recipe.
        todo: trials to run (the local executor starts no more workers than that).
        workers: ``--workers``, which overrides ``resources.workers``: local worker processes
            (default one per core), or the most trials in flight at once on Dask.
        inline: run in this process instead, whatever the recipe says.
    """
    res = loaded.recipe.resources
    if inline:
        return InlineExecutor()
    if res.executor == "dask":
        from .dask_backend import NEEDS_ADDRESS, DaskExecutor

        if not res.address:
            raise loaded.error(("resources", "executor"), NEEDS_ADDRESS)
        return DaskExecutor(res.address, max_in_flight=workers or res.workers)
    n = workers or res.workers or os.cpu_count() or 1
    return LocalExecutor(max(1, min(n, todo or 1)))
