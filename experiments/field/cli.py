"""Command line of the field benchmark: run the sweep (resumable), then write the report."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from .methods import METHODS, TASK_ORDER
from .points import build_jobs, near_first_seed_best, read_points

DEFAULT_OUT = Path("experiments/out/field")


def parse_args(argv: list[str] | None = None) -> argparse.Namespace:
    p = argparse.ArgumentParser(prog="python -m experiments.field", description=__doc__)
    p.add_argument("--tasks", nargs="+", default=list(TASK_ORDER), choices=TASK_ORDER)
    p.add_argument("--seeds", nargs="+", type=int, default=[0, 1])
    p.add_argument("--methods", nargs="+", default=list(METHODS), choices=METHODS)
    p.add_argument("--out", type=Path, default=DEFAULT_OUT)
    p.add_argument("--quick", action="store_true", help="tiny step budgets, for smoke tests only")
    p.add_argument("--core-only", action="store_true", help="skip the extra grid points (grid ends)")
    p.add_argument(
        "--near-best",
        type=float,
        default=None,
        metavar="FACTOR",
        help="later seeds run only the LM baseline lrs within FACTOR of the first seed's best "
        "(1: the best lr alone; 3.5: it and its half-decade neighbours)",
    )
    p.add_argument("--report-only", action="store_true", help="no training: report the points already in --out")
    return p.parse_args(argv)


def main(argv: list[str] | None = None) -> None:
    args = parse_args(argv)
    if args.quick and args.out == DEFAULT_OUT:
        args.out = DEFAULT_OUT.parent / "field-quick"
    if args.report_only:
        records = read_points(args.out / "points.jsonl")
        if not records:
            raise SystemExit(f"No points in {args.out / 'points.jsonl'}; run the sweep first (drop --report-only)")
    else:
        from .sweep import sweep

        jobs = build_jobs(args.tasks, args.seeds, args.methods, extras=not args.core_only)
        if args.near_best is not None:
            jobs = near_first_seed_best(jobs, read_points(args.out / "points.jsonl"), args.near_best)
        records = sweep(jobs, args.out, args.quick)
    from .report import write_outputs

    print(write_outputs(records, args.out), file=sys.stdout)
