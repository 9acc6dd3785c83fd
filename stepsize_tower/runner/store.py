"""Append-only JSON Lines results: one record per finished trial, written atomically.

Every record is one line written with a single ``write`` on a file opened for appending,
then flushed to disk, so a sweep killed at any moment (even by SIGKILL) keeps every record
it finished. A last line cut short by a kill is dropped when the file is next opened for
appending; readers ignore it. The latest record of a trial id wins: a failed trial that is
retried and succeeds counts as done.
"""

from __future__ import annotations

import json
import math
import os
from collections.abc import Iterator
from pathlib import Path
from typing import Any

__all__ = ["RESULTS_FILE", "ResultStore"]

#: File name of the results inside a sweep folder.
RESULTS_FILE = "results.jsonl"

Record = dict[str, Any]


class ResultStore:
    """The results file of one sweep folder."""

    def __init__(self, folder: str | Path) -> None:
        self.path = Path(folder) / RESULTS_FILE

    def records(self) -> Iterator[Record]:
        """Every complete record, in the order written (a torn last line is skipped)."""
        if not self.path.exists():
            return
        with self.path.open("rb") as f:
            for raw in f:
                if not raw.endswith(b"\n"):
                    break  # cut short by a kill: the trial was not recorded
                try:
                    rec = json.loads(raw)
                except json.JSONDecodeError:
                    continue
                if isinstance(rec, dict) and "trial_id" in rec:
                    yield rec

    def latest(self) -> dict[str, Record]:
        """The latest record of every trial id."""
        return {r["trial_id"]: r for r in self.records()}

    def done_ids(self) -> set[str]:
        """Ids whose latest record finished without error (these are never re-run)."""
        return {tid for tid, r in self.latest().items() if r.get("status") == "ok"}

    def _repair(self) -> None:
        """Drop a torn last line so the next record starts on a line of its own."""
        if not self.path.exists():
            return
        with self.path.open("rb+") as f:
            size = f.seek(0, os.SEEK_END)
            if size == 0:
                return
            f.seek(size - 1)
            if f.read(1) == b"\n":
                return
            f.seek(0)
            keep = f.read().rfind(b"\n") + 1
            f.truncate(keep)

    def open(self) -> _Appender:
        """An appender (repairs a torn tail first)."""
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self._repair()
        return _Appender(self.path)


class _Appender:
    """Writes whole records with one ``os.write`` each on an ``O_APPEND`` descriptor, then fsyncs."""

    def __init__(self, path: Path) -> None:
        self.fd = os.open(path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)

    def append(self, record: Record) -> None:
        data = (json.dumps(_clean(record), allow_nan=False, default=str) + "\n").encode()
        written = os.write(self.fd, data)
        while written < len(data):  # a regular file takes it in one go; be safe anyway
            written += os.write(self.fd, data[written:])
        os.fsync(self.fd)

    def close(self) -> None:
        os.close(self.fd)

    def __enter__(self) -> _Appender:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def _clean(value: Any) -> Any:
    """Non-finite floats become None (JSON has no NaN)."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {k: _clean(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_clean(v) for v in value]
    return value
