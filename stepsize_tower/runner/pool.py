"""Run trials in worker processes with a plain-text progress line; Ctrl-C stops cleanly.

Workers are started with the ``spawn`` method (no state inherited from the parent), use
``threads`` torch threads each and ignore SIGINT: the parent alone handles Ctrl-C, stops
the workers and keeps every record already written.
"""

from __future__ import annotations

import multiprocessing
import signal
import sys
import time
from collections.abc import Callable, Sequence
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait
from typing import Any, TextIO

import torch

from .execute import TrialJob, lost_record, run_trial

__all__ = ["Progress", "run_pool"]

Record = dict[str, Any]


def _init_worker(threads: int) -> None:
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    torch.set_num_threads(threads)


def _clock(seconds: float) -> str:
    s = round(seconds)
    return f"{s // 3600}:{s // 60 % 60:02d}:{s % 60:02d}" if s >= 3600 else f"{s // 60}:{s % 60:02d}"


class Progress:
    """A one-line progress report: trials done, failed, running, and the time left.

    On a terminal the line is redrawn in place; otherwise (CI, a pipe) a full line is
    printed at most every ``period`` seconds and at the end.
    """

    def __init__(self, total: int, already: int = 0, stream: TextIO | None = None, period: float = 10.0) -> None:
        self.total = total
        self.already = already
        self.stream = stream if stream is not None else sys.stderr
        self.tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self.period = period
        self.start = time.perf_counter()
        self.last = -float("inf")
        self.done = self.failed = self.running = 0

    def line(self) -> str:
        """The current progress text."""
        finished = self.done + self.failed
        elapsed = time.perf_counter() - self.start
        left = self.total - self.already - finished
        eta = _clock(elapsed / finished * left) if finished else "?"
        width = 24
        filled = int(width * (self.already + finished) / max(self.total, 1))
        bar = "#" * filled + "." * (width - filled)
        return (
            f"[{bar}] {self.already + self.done}/{self.total} done, {self.failed} failed, "
            f"{self.running} running, elapsed {_clock(elapsed)}, ETA {eta}"
        )

    def update(self, done: int, failed: int, running: int, final: bool = False) -> None:
        """Record the counts of this session and redraw when due."""
        self.done, self.failed, self.running = done, failed, running
        now = time.perf_counter()
        if self.tty:
            self.stream.write("\r" + self.line().ljust(100) + ("\n" if final else ""))
            self.stream.flush()
        elif final or now - self.last >= self.period:
            self.stream.write(self.line() + "\n")
            self.stream.flush()
            self.last = now


def run_pool(
    jobs: Sequence[TrialJob],
    workers: int,
    on_record: Callable[[Record], None],
    progress: Progress | None = None,
) -> tuple[int, int]:
    """Run ``jobs`` on ``workers`` spawned processes, handing each record to ``on_record`` as it arrives.

    Returns ``(ok, failed)`` counts. On Ctrl-C the workers are stopped, pending trials are
    dropped (they run next time) and ``KeyboardInterrupt`` is re-raised after cleanup.
    """
    ok = failed = 0
    if not jobs:
        if progress:
            progress.update(0, 0, 0, final=True)
        return ok, failed
    ctx = multiprocessing.get_context("spawn")
    threads = jobs[0].threads
    executor = ProcessPoolExecutor(max_workers=workers, mp_context=ctx, initializer=_init_worker, initargs=(threads,))
    pending: dict[Future[Record], TrialJob] = {}
    try:
        for job in jobs:
            pending[executor.submit(run_trial, job)] = job
        while pending:
            finished, _ = wait(pending, timeout=1.0, return_when=FIRST_COMPLETED)
            for fut in finished:
                job = pending.pop(fut)
                try:
                    record = fut.result()
                except Exception as exc:  # the worker process died (killed, out of memory, ...)
                    record = _lost(job, exc)
                on_record(record)
                if record["status"] == "ok":
                    ok += 1
                else:
                    failed += 1
            if progress:
                running = sum(1 for f in pending if f.running())
                progress.update(ok, failed, min(running, workers))
        if progress:
            progress.update(ok, failed, 0, final=True)
    except KeyboardInterrupt:
        # Stop the workers first; the executor then fails the pending futures itself (cancelling
        # them here races with that and makes its management thread raise).
        _stop_workers(executor)
        executor.shutdown(wait=True)
        if progress:
            progress.update(ok, failed, 0, final=True)
        raise
    executor.shutdown(wait=True)
    return ok, failed


def _stop_workers(executor: ProcessPoolExecutor) -> None:
    # ProcessPoolExecutor has no public way to stop a running call: terminate its processes.
    processes = getattr(executor, "_processes", None) or {}
    for proc in list(processes.values()):
        if proc.is_alive():
            proc.terminate()
    for proc in list(processes.values()):
        proc.join(timeout=5)


def _lost(job: TrialJob, exc: BaseException) -> Record:
    return lost_record(job, "the worker process running this trial stopped", exc)
