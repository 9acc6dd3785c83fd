"""The run list and its resumable record: one JSON line per finished run in ``points.jsonl``."""

from __future__ import annotations

import json
from collections.abc import Iterable, Sequence
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

from .methods import GRIDS, LM_TASKS, TASK_ORDER

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


def _later_priority(job: Job) -> tuple[int, int]:
    rank = {"fixed": 0, "cosine": 0, "tower": 1 if job.base != "sgd" else 2, "tower_cosine": 3}
    return (job.seed, rank[job.method])


def build_jobs(tasks: Sequence[str], seeds: Sequence[int], methods: Sequence[str], extras: bool) -> list[Job]:
    """Every run, in priority order.

    The language models' core grids for the first seed, then the small tasks (all seeds),
    then the language models' core grids for the other seeds (baselines first, then the
    Adam-like tower, then the SGD tower, then the tower under the schedule), then every
    extra point.
    """
    lms = [t for t in TASK_ORDER if t in tasks and t in LM_TASKS]
    small = [t for t in TASK_ORDER if t in tasks and t not in lms]
    jobs = [j for t in lms for j in _grid_jobs(t, seeds[0], methods, "core")]
    jobs += [j for t in small for s in seeds for j in _grid_jobs(t, s, methods, "core")]
    later = [j for s in seeds[1:] for t in lms for j in _grid_jobs(t, s, methods, "core")]
    jobs += sorted(later, key=_later_priority)
    if extras:
        jobs += [j for s in seeds for t in lms + small for j in _grid_jobs(t, s, methods, "extra")]
    return jobs


def near_first_seed_best(jobs: list[Job], done: Sequence[Record], factor: float = 3.5) -> list[Job]:
    """Drop the other seeds' language-model baseline runs far from the first seed's best lr.

    For each language-model task, base and baseline method (fixed, cosine), the first seed's best run (lowest
    final training loss) picks the lr; the other seeds keep only the grid points within
    ``factor`` of it (the best and its half-decade neighbours). Tower runs are kept as they are.
    """
    seeds = sorted({j.seed for j in jobs})
    if len(seeds) < 2:
        return jobs
    best_lr: dict[tuple[str, str, str], tuple[float, float]] = {}
    for r in done:
        if r["seed"] == seeds[0] and r["method"] in ("fixed", "cosine") and r.get("final_loss") is not None:
            key = (r["task"], r["base"], r["method"])
            if key not in best_lr or r["final_loss"] < best_lr[key][1]:
                best_lr[key] = (float(r["lr"]), float(r["final_loss"]))

    def keep(j: Job) -> bool:
        ref = best_lr.get((j.task, j.base, j.method))
        if j.seed == seeds[0] or j.task not in LM_TASKS or j.method not in ("fixed", "cosine") or ref is None:
            return True
        return max(j.lr / ref[0], ref[0] / j.lr) <= factor * (1 + 1e-9)

    return [j for j in jobs if keep(j)]


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
