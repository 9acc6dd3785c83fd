"""Run trials as tasks on a Dask distributed cluster (``resources.executor: dask``).

Set-up (the optional extra ``pip install 'stepsize-tower[dask]'``, here and on every worker)::

    dask scheduler                                            # prints tcp://HOST:8786
    dask worker tcp://HOST:8786 --nworkers 8 --nthreads 1     # on each machine
    stepsize-tower run recipe.yaml --out /shared/runs/x --executor dask --address tcp://HOST:8786

Each trial is one task running :func:`~.execute.run_trial` on its picklable
:class:`~.execute.TrialJob`. This process appends every record to ``results.jsonl`` as its
task finishes (:func:`distributed.as_completed`), so results, resume and retries are those
of the local executor. Nothing is started here: the scheduler and its workers must be
running, and this package (same version) installed on the workers.

Files: ``results.jsonl`` is written by this process only, but each trial writes its
TensorBoard run to ``OUT/tb/<run>`` on the machine of the worker that runs it, and a
``task.user`` module is imported there from the recipe's folder. Give ``--out`` (and keep
the recipe) on a filesystem every worker shares at the same path; otherwise the TensorBoard
runs stay on the workers' disks and user modules must be installed on the workers.

A worker process runs one trial at a time whatever its ``--nthreads``: a trial seeds torch's
global generator and sets its thread count (``resources.threads``), both per process. Start
workers with ``--nthreads 1`` and one process per trial slot (``--nworkers``). A worker lost
mid-trial (killed, out of memory) makes the scheduler retry the trial elsewhere, up to its
``distributed.scheduler.allowed-failures``; after that the trial gets a failed record.
"""

from __future__ import annotations

import sys
import threading
import time
import uuid
from collections.abc import Sequence
from pathlib import Path
from types import ModuleType, TracebackType
from typing import Any

from .execute import TrialJob, lost_record, run_trial
from .executor_api import Executor, ExecutorError, OnRecord
from .pool import Progress

__all__ = [
    "CONNECT_TIMEOUT",
    "INSTALL_HINT",
    "NEEDS_ADDRESS",
    "DaskExecutor",
    "require_distributed",
    "run_trial_in_worker",
]

Record = dict[str, Any]

#: How to install what this executor needs.
INSTALL_HINT = "pip install 'stepsize-tower[dask]'"
#: What to do when a recipe asks for Dask without saying where the scheduler is.
NEEDS_ADDRESS = (
    "executor 'dask' needs the address of a running Dask scheduler: set resources.address "
    "(or pass --address tcp://HOST:8786); start one with `dask scheduler` and workers with "
    "`dask worker tcp://HOST:8786 --nthreads 1`"
)
#: Seconds to wait for the scheduler before giving up.
CONNECT_TIMEOUT = 20.0
#: Seconds between checks for finished tasks.
POLL = 0.1

_ONE_TRIAL_AT_A_TIME = threading.Lock()


def require_distributed() -> ModuleType:
    """The ``distributed`` module, or :class:`ExecutorError` saying which extra to install."""
    try:
        import distributed
    except ImportError as exc:
        raise ExecutorError(
            f"executor 'dask' needs Dask distributed, which cannot be imported here ({exc}); "
            f"install the extra: {INSTALL_HINT}"
        ) from None
    return distributed


def run_trial_in_worker(job: TrialJob) -> Record:
    """:func:`~.execute.run_trial` as a task: one at a time per worker process, leaving no trace.

    A Dask worker outlives a sweep, unlike a local worker process. So that every sweep uses
    the ``task.user`` module as it is now and from its own recipe's folder (two recipes may
    both have a ``task.py``), the module search path is restored and the user module
    forgotten after each trial.
    """
    with _ONE_TRIAL_AT_A_TIME:
        path = list(sys.path)
        try:
            return run_trial(job)
        finally:
            sys.path[:] = path
            _forget_user_module(job)


def _forget_user_module(job: TrialJob) -> None:
    """Drop the user task's top-level module and its submodules if they came from the recipe's folders."""
    if not job.task.user:
        return
    top = job.task.user.partition(":")[0].split(".")[0]
    file = getattr(sys.modules.get(top), "__file__", None)
    if not file or top == __name__.split(".")[0]:
        return
    where = Path(file).resolve()
    if "site-packages" in where.parts or "dist-packages" in where.parts:
        return  # an installed package: kept, as in any other process
    if not any(where.is_relative_to(Path(folder).resolve()) for folder in job.search_path):
        return
    for name in [n for n in sys.modules if n == top or n.startswith(top + ".")]:
        del sys.modules[name]


class DaskExecutor(Executor):
    """One task per trial on the Dask scheduler at ``address``.

    Args:
        address: the scheduler, such as ``tcp://10.0.0.5:8786``.
        max_in_flight: the most trials submitted at once (None: all; the scheduler queues them).
        connect_timeout: seconds to wait for the scheduler.
    """

    def __init__(self, address: str, max_in_flight: int | None = None, connect_timeout: float | None = None) -> None:
        if max_in_flight is not None and max_in_flight < 1:
            raise ValueError(f"expected max_in_flight >= 1, got {max_in_flight}")
        self.address = address
        self.max_in_flight = max_in_flight
        self.connect_timeout = CONNECT_TIMEOUT if connect_timeout is None else connect_timeout
        self.client: Any = None

    def __enter__(self) -> DaskExecutor:
        distributed = require_distributed()
        try:
            self.client = distributed.Client(self.address, timeout=self.connect_timeout, set_as_default=False)
        except (OSError, TimeoutError, ValueError) as exc:
            raise ExecutorError(
                f"cannot reach the Dask scheduler at {self.address!r} ({type(exc).__name__}: {exc}); "
                "check the address, or start a scheduler with `dask scheduler` and workers with "
                "`dask worker ADDRESS --nthreads 1`",
                key="address",
            ) from None
        return self

    def __exit__(
        self, exc_type: type[BaseException] | None, exc: BaseException | None, tb: TracebackType | None
    ) -> None:
        if self.client is not None:
            self.client.close()
            self.client = None

    def _workers(self) -> dict[str, int]:
        """Threads of every worker process connected to the scheduler."""
        return dict(self.client.nthreads())

    def describe(self) -> str:
        where = f"the Dask cluster at {self.address}"
        if self.client is None:
            return where
        workers = self._workers()
        text = f"{where} ({len(workers)} worker{'s' if len(workers) != 1 else ''}"
        if self.max_in_flight:
            text += f", at most {self.max_in_flight} trials at once"
        return text + ")"

    def notes(self) -> list[str]:
        if self.client is None:
            return []
        workers = self._workers()
        if not workers:
            return ["no Dask worker has joined the scheduler yet; the trials wait for one"]
        if max(workers.values()) > 1:
            return [
                "some Dask workers have several threads but run one trial at a time (trials set torch's "
                "seed and thread count per process); start workers with --nthreads 1 and --nworkers N"
            ]
        return []

    def run(self, jobs: Sequence[TrialJob], on_record: OnRecord, progress: Progress | None = None) -> tuple[int, int]:
        if self.client is None:
            raise RuntimeError("DaskExecutor.run needs a connection: use it as a context manager (with ...:)")
        distributed = require_distributed()
        client = self.client
        ok = failed = 0
        waiting = list(reversed(jobs))  # popped from the end: grid order
        pending: dict[str, tuple[Any, TrialJob]] = {}

        def submit() -> Any:
            job = waiting.pop()
            key = f"stepsize-tower-trial-{job.trial.trial_id}-{uuid.uuid4().hex[:8]}"
            future = client.submit(run_trial_in_worker, job, key=key, pure=False)
            pending[future.key] = (future, job)
            return future

        finished_futures = distributed.as_completed(loop=client.loop)
        last_update = -float("inf")
        try:
            for _ in range(min(self.max_in_flight or len(waiting), len(waiting))):
                finished_futures.add(submit())
            while pending:
                batch = finished_futures.next_batch(block=False)
                for future in batch:
                    _, job = pending.pop(future.key)
                    record = _record_of(future, job)
                    on_record(record)
                    ok, failed = (ok + 1, failed) if record["status"] == "ok" else (ok, failed + 1)
                    if waiting:
                        finished_futures.add(submit())
                now = time.monotonic()
                if progress and (batch or now - last_update >= 1.0):
                    progress.update(ok, failed, self._running(len(pending)))
                    last_update = now
                if not batch:
                    time.sleep(POLL)
        except KeyboardInterrupt:
            # Unsubmitted and queued trials are dropped; a trial already running finishes on its
            # worker unrecorded (Dask cannot stop a running task) and runs again next time.
            _cancel(client, [f for f, _ in pending.values()])
            if progress:
                progress.update(ok, failed, 0, final=True)
            raise
        if progress:
            progress.update(ok, failed, 0, final=True)
        return ok, failed

    def _running(self, in_flight: int) -> int:
        try:
            return min(in_flight, len(self._workers()))
        except Exception:  # the scheduler is briefly unreachable: the count is only for show
            return 0


def _record_of(future: Any, job: TrialJob) -> Record:
    """The trial's record, or a failed one when its worker could not return it."""
    try:
        record: Record = future.result()
    except Exception as exc:  # KilledWorker, a cancelled task, a worker that cannot unpickle the job
        record = lost_record(job, "the Dask worker running this trial stopped or could not run it", exc)
    return record


def _cancel(client: Any, futures: list[Any]) -> None:
    try:
        client.cancel(futures)
    except Exception:  # the connection is already gone: nothing left to cancel from here
        pass
