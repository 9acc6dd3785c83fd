"""The run list and its resumable record: one JSON line per finished run in ``points.jsonl``."""

from __future__ import annotations

import json
from collections.abc import Iterable, Sequence
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

from .methods import GRIDS, TASK_ORDER

Record = dict[str, Any]


@dataclass(frozen=True)
class Job:
    """One run: a task, a base optimizer, a method, a typed lr and a seed."""

    task: str
    base: str
    method: str
    lr: float
    seed: int

    def key(self) -> tuple[str, str, str, float, int]:
        return (self.task, self.base, self.method, self.lr, self.seed)


def record_key(r: Record) -> tuple[str, str, str, float, int]:
    return (r["task"], r["base"], r["method"], float(r["lr"]), int(r["seed"]))


def _grid_jobs(task: str, seed: int, methods: Sequence[str], part: str) -> list[Job]:
    jobs = []
    for (base, method), grid in GRIDS[task].items():
        if method in methods:
            jobs += [Job(task, base, method, lr, seed) for lr in (grid.core if part == "core" else grid.extra)]
    return jobs


def build_jobs(tasks: Sequence[str], seeds: Sequence[int], methods: Sequence[str], extras: bool) -> list[Job]:
    """Every run, in priority order.

    The language models' core grids for the first seed, then the small tasks (all seeds),
    then the language models' core grids for the other seeds, then every extra point.
    """
    lms = [t for t in TASK_ORDER if t in tasks and t in ("word_lstm", "char_transformer")]
    small = [t for t in TASK_ORDER if t in tasks and t not in lms]
    jobs = [j for t in lms for j in _grid_jobs(t, seeds[0], methods, "core")]
    jobs += [j for t in small for s in seeds for j in _grid_jobs(t, s, methods, "core")]
    jobs += [j for s in seeds[1:] for t in lms for j in _grid_jobs(t, s, methods, "core")]
    if extras:
        jobs += [j for s in seeds for t in lms + small for j in _grid_jobs(t, s, methods, "extra")]
    return jobs


def read_points(path: Path) -> list[Record]:
    """Every record of ``points.jsonl`` (later lines win for a repeated run)."""
    if not path.exists():
        return []
    by_key: dict[tuple[str, str, str, float, int], Record] = {}
    for line in path.read_text().splitlines():
        if line.strip():
            r = json.loads(line)
            by_key[record_key(r)] = r
    return list(by_key.values())


def append_point(path: Path, record: Record) -> None:
    """Append one record and flush, so a killed sweep loses at most the run in progress."""
    with path.open("a") as sink:
        sink.write(json.dumps(record) + "\n")
        sink.flush()


def pending(jobs: Iterable[Job], done: Iterable[Record]) -> list[Job]:
    """The jobs without a record yet."""
    seen = {record_key(r) for r in done}
    return [j for j in jobs if j.key() not in seen]


def job_record(job: Job) -> Record:
    return asdict(job)
