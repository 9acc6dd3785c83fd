"""Sensitivity benchmark: does training end well whatever initial step size the user types?

For every task and base (Adam, SGD), sweep the initial step size over 1e-7 ... 10 with
the tower at its default settings (only ``lr`` given) and with the fixed-rate
``torch.optim`` optimizer, on the same seeds and minibatches. A point is GOOD when its
final training loss ``L ≤ L_best + 0.05 × (L_init − L_best)`` (normalized gap), where
``L_best`` is the best fixed-rate final loss of that task, base and seed and ``L_init`` the
loss of that seed's model before its first step. The report gives, beside it, the earlier
ratio criterion ``L ≤ max(1.25 × L_best, L_best + 0.01)`` and the gap on the held-out loss
(see ``sensitivity_report.py``).

Usage::

    .venv/bin/python experiments/sensitivity.py                       # 1 seed, all tasks
    .venv/bin/python experiments/sensitivity.py --seeds 0 1 2
    .venv/bin/python experiments/sensitivity.py --variant 'd2={"depth": 2}' --tasks mlp_digits
    .venv/bin/python experiments/sensitivity.py --bases sgdm           # SGD with momentum 0.9
    .venv/bin/python experiments/sensitivity.py --from-points experiments/out/sensitivity/points.jsonl

Output (under ``--out``): ``points.jsonl`` (one line per point, written as points
finish), ``points.json`` (every point with the run's settings), ``results.md`` (the
report, also printed) and ``sensitivity.png``. ``--from-points`` re-reports an earlier
run's file under today's criteria (points from before the initial held-out loss was kept
get it from their seed's freshly built task, the same weights they started from).
"""

from __future__ import annotations

import argparse
import json
import math
import multiprocessing
import os
import platform
import subprocess
import sys
import time
from collections.abc import Sequence
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

import torch
from sensitivity_report import BASES, DEFAULT_BASES, FIXED, GAP, RATIO, TOWER, fill_initial_test_loss, plot, report

from stepsize_tower import TowerAdam, TowerSGD
from stepsize_tower.tasks import TASKS, get_task, task_names, train

LRS: tuple[float, ...] = tuple(10.0**k for k in range(-7, 2))

#: The ``sgdm`` base: heavy-ball momentum, for the fixed rate and the tower alike.
SGDM_MOMENTUM = 0.9

#: Rough relative cost of one run per task, to start the slow ones first.
_COST = {"char_gru": 10.0, "cnn_digits": 3.0, "mlp_digits": 1.0}

Record = dict[str, Any]


# ---------------------------------------------------------------------------- one point


@dataclass(frozen=True)
class Job:
    """One point of the sweep: a task, a base, a method (fixed, tower or a variant), an lr, a seed."""

    task: str
    base: str
    method: str
    tower_kwargs: str  # JSON; unused for the fixed method
    lr: float
    seed: int
    steps: int | None


def make_optimizer(
    base: str, method: str, tower_kwargs: dict[str, Any], params: Any, lr: float
) -> torch.optim.Optimizer:
    """The fixed-rate ``torch.optim`` optimizer, or a tower with ``lr`` and ``tower_kwargs``."""
    momentum = {"momentum": SGDM_MOMENTUM} if base == "sgdm" else {}
    if method == FIXED:
        return torch.optim.Adam(params, lr=lr) if base == "adam" else torch.optim.SGD(params, lr=lr, **momentum)
    tower = TowerAdam if base == "adam" else TowerSGD
    return tower(params, lr=lr, **momentum, **tower_kwargs)


def _finite_or_none(x: float) -> float | None:
    return x if math.isfinite(x) else None


def run_job(job: Job) -> Record:
    """Train one point and return its record (non-finite losses are stored as ``None``)."""
    torch.set_num_threads(1)
    start = time.perf_counter()
    task = get_task(job.task).build(job.seed)
    steps = job.steps if job.steps is not None else task.default_steps
    opt = make_optimizer(job.base, job.method, json.loads(job.tower_kwargs), task.model.parameters(), job.lr)
    with torch.random.fork_rng(devices=[]):  # the run stays bitwise what it was without this evaluation
        initial_test = task.test_loss(task.model)
    result = train(task, opt, steps)
    is_tower = job.method != FIXED
    step_sizes = opt.step_sizes() if is_tower else [[g["lr"]] for g in opt.param_groups]  # type: ignore[attr-defined]
    record: Record = asdict(job)
    record.update(
        steps=steps,
        steps_done=result.steps,
        initial_loss=_finite_or_none(result.initial_loss),
        initial_test_loss=_finite_or_none(initial_test),
        final_loss=_finite_or_none(result.final_loss),
        test_loss=None if result.diverged else _finite_or_none(task.test_loss(task.model)),
        diverged=result.diverged,
        train_seconds=result.seconds,
        wall_seconds=time.perf_counter() - start,
        step_sizes=step_sizes,
        retreats=opt.retreats() if is_tower else 0,  # type: ignore[attr-defined]
        skipped=opt.skipped_steps() if is_tower else 0,  # type: ignore[attr-defined]
    )
    return record


def _init_worker() -> None:
    torch.set_num_threads(1)


# ---------------------------------------------------------------------------- command line


def parse_variant(text: str) -> tuple[str, dict[str, Any]]:
    """``NAME=JSON`` → (name, tower keyword arguments)."""
    name, sep, spec = text.partition("=")
    name = name.strip()
    if not sep or not name:
        raise argparse.ArgumentTypeError(f"Invalid variant: {text!r}; expected NAME=JSON, e.g. 'd2={{\"depth\": 2}}'")
    if name in (FIXED, TOWER):
        raise argparse.ArgumentTypeError(f"Invalid variant name: {name!r} is reserved")
    try:
        kwargs = json.loads(spec)
    except json.JSONDecodeError as err:
        raise argparse.ArgumentTypeError(f"Invalid variant {name!r}: {err}") from None
    if not isinstance(kwargs, dict):
        raise argparse.ArgumentTypeError(f"Invalid variant {name!r}: expected a JSON object of keyword arguments")
    return name, kwargs


def _check_variants(variants: dict[str, dict[str, Any]], bases: Sequence[str]) -> None:
    """Fail before the sweep if a variant's keyword arguments are not accepted by a tower."""
    for name, kwargs in variants.items():
        for base in bases:
            try:
                make_optimizer(base, name, kwargs, [torch.zeros(1, requires_grad=True)], 1e-3)
            except (TypeError, ValueError) as err:
                raise SystemExit(f"Variant {name!r} is invalid for base {base!r}: {err}") from None


def build_jobs(args: argparse.Namespace, variants: dict[str, dict[str, Any]]) -> list[Job]:
    methods = {FIXED: {}, TOWER: {}, **variants}
    jobs = [
        Job(task, base, method, json.dumps(kwargs, sort_keys=True), lr, seed, args.steps)
        for task in args.tasks
        for base in args.bases
        for method, kwargs in methods.items()
        for lr in LRS
        for seed in args.seeds
    ]
    jobs.sort(key=lambda j: -_COST.get(j.task, 0.3))  # stable: slow tasks first, order kept otherwise
    return jobs


def _environment() -> dict[str, Any]:
    from stepsize_tower.tasks.charlm import corpus_digest

    def git(*cmd: str) -> str:
        try:
            return subprocess.run(["git", *cmd], capture_output=True, text=True, check=False, timeout=5).stdout.strip()
        except OSError:
            return ""

    commit, dirty = git("rev-parse", "--short", "HEAD"), bool(git("status", "--porcelain", "--untracked-files=no"))
    return {
        "python": platform.python_version(),
        "torch": torch.__version__,
        "cpus": os.cpu_count(),
        "git_commit": commit,
        "git_dirty": dirty,
        "char_corpus": corpus_digest(),
    }


def write_outputs(records: list[Record], settings: dict[str, Any], out: Path) -> str:
    """Write ``points.json``, ``results.md`` and ``sensitivity.png``; return the report."""
    filled = fill_initial_test_loss(records)
    if filled:
        settings["initial_test_loss_filled"] = filled
    (out / "points.json").write_text(json.dumps({"settings": settings, "points": records}, indent=1))
    text = report(records, settings)
    (out / "results.md").write_text(text + "\n")
    plot(records, out / "sensitivity.png")
    return text


def _read_points(path: Path) -> list[Record]:
    if path.suffix == ".jsonl":
        return [json.loads(line) for line in path.read_text().splitlines() if line.strip()]
    return list(json.loads(path.read_text())["points"])


def main(argv: Sequence[str] | None = None) -> None:
    parser = argparse.ArgumentParser(
        description=__doc__.split("\n\n")[0], formatter_class=argparse.RawTextHelpFormatter
    )
    parser.add_argument("--seeds", type=int, nargs="+", default=[0], help="seeds (default: 0)")
    parser.add_argument("--tasks", nargs="+", default=task_names(), choices=list(TASKS), help="tasks (default: all)")
    parser.add_argument(
        "--bases",
        nargs="+",
        default=list(DEFAULT_BASES),
        choices=BASES,
        help="bases (default: adam sgd; sgdm = SGD with momentum 0.9)",
    )
    parser.add_argument("--steps", type=int, default=None, help="steps per run (default: each task's own, 300)")
    parser.add_argument("--workers", type=int, default=2, help="worker processes (default: 2)")
    parser.add_argument("--out", type=Path, default=Path("experiments/out/sensitivity"), help="output folder")
    parser.add_argument(
        "--variant",
        type=parse_variant,
        action="append",
        default=[],
        metavar="NAME=JSON",
        help="an extra tower configuration: keyword arguments of TowerAdam/TowerSGD (repeatable)",
    )
    parser.add_argument("--from-points", type=Path, default=None, help="only rebuild the report from a points file")
    args = parser.parse_args(argv)
    args.out.mkdir(parents=True, exist_ok=True)

    if args.from_points is not None:
        records = _read_points(args.from_points)
        settings: dict[str, Any] = {"source": str(args.from_points), "variants": {}}
    else:
        variants = dict(args.variant)
        if len(variants) != len(args.variant):
            raise SystemExit("Variant names must be unique")
        _check_variants(variants, args.bases)
        records, settings = sweep(args, variants)
    print(write_outputs(records, settings, args.out))


def sweep(args: argparse.Namespace, variants: dict[str, dict[str, Any]]) -> tuple[list[Record], dict[str, Any]]:
    """Run every point on a process pool, appending each record to ``points.jsonl`` as it finishes."""
    jobs = build_jobs(args, variants)
    settings: dict[str, Any] = {
        "seeds": args.seeds,
        "tasks": args.tasks,
        "bases": args.bases,
        "steps": args.steps,
        "workers": args.workers,
        "lrs": list(LRS),
        "variants": variants,
        "good_rule": {"gap": GAP.gap, "ratio (earlier)": RATIO.ratio, "slack (earlier)": RATIO.slack},
        "environment": _environment(),
    }
    stream = args.out / "points.jsonl"
    stream.write_text("")
    records: list[Record] = []
    start = time.perf_counter()
    print(f"{len(jobs)} points on {args.workers} workers → {args.out}", file=sys.stderr)
    ctx = multiprocessing.get_context("spawn")
    with ctx.Pool(args.workers, initializer=_init_worker) as pool, stream.open("a") as sink:
        for k, rec in enumerate(pool.imap_unordered(run_job, jobs), 1):
            records.append(rec)
            sink.write(json.dumps(rec) + "\n")
            sink.flush()
            if k % 10 == 0 or k == len(jobs):
                print(f"  {k}/{len(jobs)} points, {time.perf_counter() - start:.0f} s", file=sys.stderr)
    settings["elapsed_seconds"] = time.perf_counter() - start
    return records, settings


if __name__ == "__main__":
    main()
