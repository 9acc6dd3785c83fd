"""Run the field benchmark's jobs one after another (one process, one thread)."""

from __future__ import annotations

import importlib
import sys
import time
from pathlib import Path
from typing import Any

import torch

from .methods import optimizer_factory
from .points import Job, Record, append_point, job_record, pending, read_points

#: ``--quick`` step budgets per task (smoke tests only; the numbers mean nothing).
QUICK_STEPS = {"word_lstm": 30, "char_transformer": 30, "resnet_digits": 30, "lsq_raw": 50}


def run_job(job: Job, steps: int | None) -> Record:
    """Train one run and return its record."""
    torch.set_num_threads(1)
    task = importlib.import_module(f"experiments.field.{job.task}")
    start = time.perf_counter()
    result: dict[str, Any] = task.run(job.seed, optimizer_factory(job.task, job.base, job.method, job.lr), steps)
    record = job_record(job)
    record.update(result)
    record["steps"] = steps or task.STEPS
    record["wall_seconds"] = time.perf_counter() - start
    return record


def sweep(jobs: list[Job], out: Path, quick: bool) -> list[Record]:
    """Run every job not yet in ``out/points.jsonl``, appending each record as it finishes."""
    out.mkdir(parents=True, exist_ok=True)
    stream = out / "points.jsonl"
    todo = pending(jobs, read_points(stream))
    print(f"{len(jobs)} runs, {len(jobs) - len(todo)} already done, {len(todo)} to run → {stream}", file=sys.stderr)
    start = time.perf_counter()
    for k, job in enumerate(todo, 1):
        rec = run_job(job, QUICK_STEPS[job.task] if quick else None)
        append_point(stream, rec)
        fin = rec["final_loss"]
        print(
            f"[{k}/{len(todo)} {time.perf_counter() - start:.0f}s] {job.task} {job.base} {job.method} lr={job.lr:g} "
            f"seed={job.seed}: train {fin if fin is None else round(fin, 4)} held-out "
            f"{rec['held_out_loss'] if rec['held_out_loss'] is None else round(rec['held_out_loss'], 4)} "
            f"a0 {rec['final_step_size']:.3g} ({rec['wall_seconds']:.1f}s)",
            file=sys.stderr,
            flush=True,
        )
    return read_points(stream)
