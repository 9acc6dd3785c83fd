"""Sensitivity benchmark: does training end well whatever initial step size the user types?

For every task and base (Adam, SGD), sweep the initial step size over 1e-7 ... 10 with
the tower at its default settings (only ``lr`` given) and with the fixed-rate
``torch.optim`` optimizer, on the same seeds and minibatches. A point is GOOD when its
final training loss is at most ``max(1.25 × best, best + 0.01)``, where ``best`` is the
best fixed-rate loss of that task, base and seed.

Usage::

    .venv/bin/python experiments/sensitivity.py                       # 1 seed, all tasks
    .venv/bin/python experiments/sensitivity.py --seeds 0 1 2
    .venv/bin/python experiments/sensitivity.py --variant 'd2={"depth": 2}' --tasks mlp_digits
    .venv/bin/python experiments/sensitivity.py --from-points experiments/out/sensitivity/points.jsonl

Output (under ``--out``): ``points.jsonl`` (one line per point, written as points
finish), ``points.json`` (every point with the run's settings), ``results.md`` (the
report, also printed) and ``sensitivity.png``.
"""

from __future__ import annotations

import argparse
import json
import math
import multiprocessing
import os
import platform
import statistics
import subprocess
import sys
import time
from collections import defaultdict
from collections.abc import Iterable, Sequence
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

import torch

from stepsize_tower import TowerAdam, TowerSGD
from stepsize_tower.tasks import TASKS, get_task, task_names, train

LRS: tuple[float, ...] = tuple(10.0**k for k in range(-7, 2))
BASES = ("adam", "sgd")
FIXED = "fixed"
TOWER = "tower"
GOOD_RATIO = 1.25
GOOD_SLACK = 0.01
AT_BEST_TOLERANCE = 0.05

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
    if method == FIXED:
        return torch.optim.Adam(params, lr=lr) if base == "adam" else torch.optim.SGD(params, lr=lr)
    tower = TowerAdam if base == "adam" else TowerSGD
    return tower(params, lr=lr, **tower_kwargs)


def _finite_or_none(x: float) -> float | None:
    return x if math.isfinite(x) else None


def run_job(job: Job) -> Record:
    """Train one point and return its record (non-finite losses are stored as ``None``)."""
    torch.set_num_threads(1)
    start = time.perf_counter()
    task = get_task(job.task).build(job.seed)
    steps = job.steps if job.steps is not None else task.default_steps
    opt = make_optimizer(job.base, job.method, json.loads(job.tower_kwargs), task.model.parameters(), job.lr)
    result = train(task, opt, steps)
    is_tower = job.method != FIXED
    step_sizes = opt.step_sizes() if is_tower else [[g["lr"]] for g in opt.param_groups]  # type: ignore[attr-defined]
    record: Record = asdict(job)
    record.update(
        steps=steps,
        steps_done=result.steps,
        initial_loss=_finite_or_none(result.initial_loss),
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


# ---------------------------------------------------------------------------- analysis


def _loss(r: Record) -> float:
    return math.nan if r["final_loss"] is None else float(r["final_loss"])


def _threshold(best: float) -> float:
    return max(GOOD_RATIO * best, best + GOOD_SLACK)


def _fmt(x: float | None, digits: int = 3) -> str:
    if x is None or not math.isfinite(x):
        return "nan"
    return f"{x:.{digits}g}"


def _lr_label(lr: float) -> str:
    return f"1e{round(math.log10(lr)):+d}".replace("+", "")


@dataclass
class Cell:
    """Every point of one task, base and method, by seed and lr."""

    loss: dict[int, dict[float, float]]
    good: dict[int, dict[float, bool]]
    a0: dict[int, dict[float, float]]
    retreats: int
    diverged: int
    seconds: float


def analyse(records: Sequence[Record]) -> tuple[dict[tuple[str, str, int], float], dict[tuple[str, str, str], Cell]]:
    """The best fixed-rate loss per (task, base, seed) and the judged points per (task, base, method)."""
    best: dict[tuple[str, str, int], float] = {}
    for r in records:
        if r["method"] == FIXED and r["final_loss"] is not None:
            key = (r["task"], r["base"], r["seed"])
            best[key] = min(best.get(key, math.inf), _loss(r))
    cells: dict[tuple[str, str, str], Cell] = {}
    for r in records:
        key3 = (r["task"], r["base"], r["method"])
        cell = cells.setdefault(key3, Cell(defaultdict(dict), defaultdict(dict), defaultdict(dict), 0, 0, 0.0))
        loss = _loss(r)
        b = best.get((r["task"], r["base"], r["seed"]), math.nan)
        cell.loss[r["seed"]][r["lr"]] = loss
        cell.good[r["seed"]][r["lr"]] = math.isfinite(loss) and loss <= _threshold(b)
        cell.a0[r["seed"]][r["lr"]] = float(r["step_sizes"][0][0])
        cell.retreats += int(r["retreats"])
        cell.diverged += int(r["diverged"])
        cell.seconds += float(r["wall_seconds"])
    return best, cells


def _methods(records: Iterable[Record]) -> list[str]:
    seen = list(dict.fromkeys(r["method"] for r in records))
    return [m for m in (FIXED, TOWER) if m in seen] + [m for m in seen if m not in (FIXED, TOWER)]


def _ordered(values: Iterable[str], order: Sequence[str]) -> list[str]:
    vals = set(values)
    return [v for v in order if v in vals] + sorted(vals - set(order))


def _ratio_median(xs: list[float]) -> float:
    finite = [x for x in xs if math.isfinite(x)]
    return statistics.median(finite) if finite else math.nan


def report(records: Sequence[Record], settings: dict[str, Any]) -> str:
    """The Markdown report of a sweep."""
    best, cells = analyse(records)
    tasks = _ordered({r["task"] for r in records}, task_names())
    bases = _ordered({r["base"] for r in records}, BASES)
    methods = _methods(records)
    seeds = sorted({r["seed"] for r in records})
    lrs = sorted({r["lr"] for r in records})
    n_seeds = len(seeds)
    out: list[str] = ["# Sensitivity to the initial step size", ""]
    out.append(
        f"Seeds {seeds}; initial lr {_lr_label(lrs[0])} … {_lr_label(lrs[-1])} ({len(lrs)} points); "
        f"steps {settings.get('steps') or 'task default'}; GOOD: final train loss ≤ max({GOOD_RATIO} × best fixed, "
        f"best fixed + {GOOD_SLACK}) for the same task, base and seed. Variants: "
        + (", ".join(f"`{k}` = `{v}`" for k, v in settings.get("variants", {}).items()) or "none")
        + "."
    )
    out.append("")

    # -- main table
    out.append("## Good points per task and base")
    out.append("")
    out.append(
        "| task | base | method | good | ends 1e-7 / 10 | best ÷ best fixed | at best fixed lr ÷ fixed | "
        "diverged | not good at lr | final a0 range | retreats | time s |"
    )
    out.append("|---|---|---|---|---|---|---|---|---|---|---|---|")
    per_seed_total: dict[str, dict[int, int]] = {m: defaultdict(int) for m in methods}
    totals: dict[tuple[str, str], list[int]] = defaultdict(lambda: [0, 0])
    for task in tasks:
        for base in bases:
            fixed = cells.get((task, base, FIXED))
            for method in methods:
                cell = cells.get((task, base, method))
                if cell is None:
                    continue
                counts = [sum(cell.good[s].values()) for s in seeds]
                for s, c in zip(seeds, counts, strict=True):
                    per_seed_total[method][s] += c
                n_pts = sum(len(cell.good[s]) for s in seeds)
                totals[(method, base)][0] += sum(counts)
                totals[(method, base)][1] += n_pts
                good_txt = f"{sum(counts)}/{n_pts}"
                if n_seeds > 1:
                    good_txt += f" (per seed {'/'.join(map(str, counts))}; min {min(counts)}, max {max(counts)})"
                ends = " / ".join(
                    f"{sum(cell.good[s].get(lr, False) for s in seeds)}/{n_seeds}"
                    if n_seeds > 1
                    else ("✓" if cell.good[seeds[0]].get(lr, False) else "✗")
                    for lr in (lrs[0], lrs[-1])
                )
                ratios_best, ratios_at = [], []
                for s in seeds:
                    b = best.get((task, base, s), math.nan)
                    own = [x for x in cell.loss[s].values() if math.isfinite(x)]
                    ratios_best.append(min(own) / b if own and b > 0 else math.nan)
                    if fixed is not None and method != FIXED:
                        lr_star = _best_lr(fixed.loss[s])
                        ratios_at.append(cell.loss[s].get(lr_star, math.nan) / fixed.loss[s][lr_star])
                rb = _ratio_median(ratios_best)
                best_txt = "—" if method == FIXED else f"{_fmt(rb)}{' (beats)' if rb < 1 else ''}"
                if method == FIXED or not ratios_at:
                    at_txt = "—"
                else:
                    ra = _ratio_median(ratios_at)
                    at_txt = f"{_fmt(ra)} ({'within' if abs(ra - 1) <= AT_BEST_TOLERANCE else 'outside'} 5%)"
                bad = [lr for lr in lrs if not all(cell.good[s].get(lr, False) for s in seeds)]
                bad_txt = ", ".join(_lr_label(lr) for lr in bad) or "—"
                a0s = [cell.a0[s][lr] for s in seeds for lr in cell.a0[s]]
                a0_txt = "—" if method == FIXED else f"{_fmt(min(a0s), 2)} … {_fmt(max(a0s), 2)}"
                out.append(
                    f"| {task} | {base} | {method} | {good_txt} | {ends} | {best_txt} | {at_txt} | {cell.diverged} | "
                    f"{bad_txt} | {a0_txt} | {cell.retreats if method != FIXED else '—'} | {cell.seconds:.1f} |"
                )
    out.append("")

    # -- totals
    out.append("## Totals")
    out.append("")
    out.append("| method | " + " | ".join(bases) + " | all | per seed (all bases) |")
    out.append("|---|" + "---|" * (len(bases) + 2))
    for method in methods:
        row = [method]
        g_all = n_all = 0
        for base in bases:
            g, n = totals[(method, base)]
            g_all, n_all = g_all + g, n_all + n
            row.append(f"{g}/{n} ({100 * g / max(n, 1):.0f}%)")
        row.append(f"{g_all}/{n_all} ({100 * g_all / max(n_all, 1):.0f}%)")
        ps = [per_seed_total[method][s] for s in seeds]
        row.append(f"{'/'.join(map(str, ps))} (min {min(ps)}, max {max(ps)})")
        out.append("| " + " | ".join(row) + " |")
    out.append("")

    # -- loss grids
    out.append("## Final train loss by initial lr (median over seeds; **bold** = good in every seed)")
    out.append("")
    out.append("| task | base | method | " + " | ".join(_lr_label(lr) for lr in lrs) + " |")
    out.append("|---|---|---|" + "---|" * len(lrs))
    for task in tasks:
        for base in bases:
            for method in methods:
                cell = cells.get((task, base, method))
                if cell is None:
                    continue
                vals = []
                for lr in lrs:
                    xs = [cell.loss[s].get(lr, math.nan) for s in seeds]
                    med = _median_nan(xs)
                    txt = _fmt(med)
                    vals.append(f"**{txt}**" if all(cell.good[s].get(lr, False) for s in seeds) else txt)
                out.append(f"| {task} | {base} | {method} | " + " | ".join(vals) + " |")
    out.append("")

    # -- timing
    out.append("## Wall time")
    out.append("")
    by_method: dict[str, float] = defaultdict(float)
    for r in records:
        by_method[r["method"]] += float(r["wall_seconds"])
    out.append(
        "Summed over points (build + train + evaluate): "
        + ", ".join(f"{m} {by_method[m]:.0f} s" for m in methods)
        + (
            f". Elapsed: {settings['elapsed_seconds']:.0f} s with {settings['workers']} workers."
            if "elapsed_seconds" in settings
            else "."
        )
    )
    out.append("")
    return "\n".join(out)


def _best_lr(losses: dict[float, float]) -> float:
    """The lr with the lowest finite loss (diverged points count as worst)."""
    return min(losses, key=lambda lr: _nan_last(losses[lr]))


def _nan_last(x: float) -> float:
    return x if math.isfinite(x) else math.inf


def _median_nan(xs: list[float]) -> float:
    """Median that counts a diverged (nan) point as the worst value."""
    return statistics.median_high([_nan_last(x) for x in xs]) if xs else math.nan


# ---------------------------------------------------------------------------- plot


def plot(records: Sequence[Record], path: Path) -> None:
    """Final loss vs initial lr per task (columns) and base (rows); seed spread as a band."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    best, cells = analyse(records)
    tasks = _ordered({r["task"] for r in records}, task_names())
    bases = _ordered({r["base"] for r in records}, BASES)
    methods = _methods(records)
    seeds = sorted({r["seed"] for r in records})
    initial = {(r["task"], r["seed"]): r["initial_loss"] for r in records if r["initial_loss"] is not None}
    fig, axes = plt.subplots(len(bases), len(tasks), figsize=(3.6 * len(tasks), 3.2 * len(bases)), squeeze=False)
    colors = {FIXED: "black", TOWER: "tab:red"}
    palette = iter(["tab:blue", "tab:green", "tab:purple", "tab:orange", "tab:brown", "tab:pink", "tab:olive"])
    for m in methods:
        colors.setdefault(m, next(palette, "tab:gray"))
    for i, base in enumerate(bases):
        for j, task in enumerate(tasks):
            ax = axes[i][j]
            finite_all = [
                _loss(r) for r in records if r["task"] == task and r["base"] == base and math.isfinite(_loss(r))
            ]
            inits = [v for (t, _s), v in initial.items() if t == task]
            top = 3 * max(inits) if inits else max(finite_all or [1.0])
            bottom = 0.5 * min(finite_all) if finite_all else 1e-3
            for method in methods:
                cell = cells.get((task, base, method))
                if cell is None:
                    continue
                lrs = sorted({lr for s in seeds for lr in cell.loss[s]})
                per_lr = [[cell.loss[s].get(lr, math.nan) for s in seeds] for lr in lrs]
                clipped = [[min(x, top) if math.isfinite(x) else top for x in xs] for xs in per_lr]
                med = [statistics.median(xs) for xs in clipped]
                style = "-" if method != FIXED else "--"
                ax.plot(lrs, med, style, marker="o", ms=3, color=colors[method], label=method)
                if len(seeds) > 1:
                    ax.fill_between(
                        lrs, [min(xs) for xs in clipped], [max(xs) for xs in clipped], color=colors[method], alpha=0.2
                    )
                nan_lrs = [lr for lr, xs in zip(lrs, per_lr, strict=True) if any(not math.isfinite(x) for x in xs)]
                off_lrs = [
                    lr for lr, xs in zip(lrs, per_lr, strict=True) if any(math.isfinite(x) and x > top for x in xs)
                ]
                ax.plot(nan_lrs, [top] * len(nan_lrs), "x", color=colors[method], ms=7)
                ax.plot(off_lrs, [top] * len(off_lrs), "^", color=colors[method], ms=5)
            thr = [_threshold(best[(task, base, s)]) for s in seeds if (task, base, s) in best]
            if thr:
                ax.axhline(statistics.median(thr), color="gray", lw=0.8, ls=":", label="good threshold")
            ax.set_xscale("log")
            ax.set_yscale("log")
            ax.set_ylim(bottom, top * 1.5)
            ax.set_title(f"{task} · {base}", fontsize=9)
            ax.tick_params(labelsize=7)
            if i == len(bases) - 1:
                ax.set_xlabel("initial lr", fontsize=8)
            if j == 0:
                ax.set_ylabel("final train loss", fontsize=8)
    axes[0][0].legend(fontsize=7)
    fig.suptitle(
        "Final train loss vs initial step size (x: diverged; ^: above 3 × initial loss, clipped; band: seed min–max)",
        fontsize=10,
    )
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


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
    parser.add_argument("--bases", nargs="+", default=list(BASES), choices=BASES, help="bases (default: adam sgd)")
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
        "good_rule": {"ratio": GOOD_RATIO, "slack": GOOD_SLACK},
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
