"""The field benchmark's report: ``results.md`` (tables) and ``field.png`` (the plot)."""

from __future__ import annotations

import math
import statistics
from collections import defaultdict
from collections.abc import Iterable, Sequence
from pathlib import Path

from .judge import (
    GAP,
    RATIO_FLOOR,
    best_baselines,
    gap_fraction,
    is_good,
    is_good_log,
    loss_of,
    median_finite,
    step_ratio,
)
from .methods import COSINE, METHODS, TASK_ORDER, TOWER, TOWER_METHODS
from .points import Record

#: Where the trajectory table samples a run, as fractions of its steps.
TRAJECTORY_FRACTIONS = (0.0, 0.05, 0.1, 0.2, 0.4, 0.7)


def _fmt(x: float | None, digits: int = 3) -> str:
    if x is None or not math.isfinite(x):
        return "nan"
    return f"{x:.{digits}g}"


def _lr(lr: float) -> str:
    return f"{lr:.0e}".replace("e-0", "e-").replace("e+0", "e")


def _ordered(records: Iterable[Record], field: str, order: Sequence[str]) -> list[str]:
    seen = {r[field] for r in records}
    return [x for x in order if x in seen] + sorted(seen - set(order))


def _select(records: Iterable[Record], **kw: object) -> list[Record]:
    return [r for r in records if all(r[k] == v for k, v in kw.items())]


def _pairs(records: Sequence[Record]) -> list[tuple[str, str]]:
    tasks = _ordered(records, "task", TASK_ORDER)
    return [(t, b) for t in tasks for b in _ordered(_select(records, task=t), "base", ("adam", "adamw", "sgd"))]


def baseline_table(records: Sequence[Record]) -> list[str]:
    best = best_baselines(records)
    out = ["## Best tuned baselines (per seed)", ""]
    out.append(
        "| task | base | seed | L_init | L_best train | held-out | by | best fixed lr (train) | good if ≤ | "
        "log-gap: ≤ |"
    )
    out.append("|---|---|---|---|---|---|---|---|---|---|")
    for (task, base, seed), b in sorted(best.items(), key=lambda kv: (TASK_ORDER.index(kv[0][0]), kv[0][1:])):
        out.append(
            f"| {task} | {base} | {seed} | {_fmt(b.initial, 4)} | {_fmt(b.loss, 4)} | {_fmt(b.held_out, 4)} | "
            f"{b.method} {_lr(b.lr)} | {_lr(b.best_fixed_lr)} ({_fmt(b.best_fixed_loss, 4)}) | "
            f"{_fmt(b.threshold(), 4)} | {_fmt(b.log_threshold(), 4)} |"
        )
    return [*out, ""]


def good_table(records: Sequence[Record]) -> list[str]:
    best = best_baselines(records)
    out = [f"## Good runs under the {GAP:.0%} normalized gap (training loss)", ""]
    out.append(
        "| task | base | method | good | good (log-gap) | diverged | not good at (seed) | train range | "
        "held-out range | final a0 ÷ best fixed lr | runs < 1/30 | s/run |"
    )
    out.append("|---|---|---|---|---|---|---|---|---|---|---|---|")
    for task, base in _pairs(records):
        for method in _ordered(_select(records, task=task, base=base), "method", METHODS):
            rs = sorted(_select(records, task=task, base=base, method=method), key=lambda r: (r["seed"], r["lr"]))
            judged = [(r, is_good(r, best)) for r in rs]
            n_good = sum(g is True for _, g in judged)
            n_log = sum(is_good_log(r, best) is True for r in rs)
            bad = ", ".join(f"{_lr(r['lr'])} ({r['seed']})" for r, g in judged if g is False) or "—"
            trains = [loss_of(r) for r in rs]
            helds = [math.inf if r["held_out_loss"] is None else r["held_out_loss"] for r in rs]
            ratio_txt, below = "—", "—"
            if method == TOWER:
                ratios = [step_ratio(r, best) for r in rs]
                ratio_txt = f"{_fmt(min(ratios), 2)} … {_fmt(max(ratios), 2)}"
                below = str(sum(x < RATIO_FLOOR for x in ratios))
            secs = statistics.mean(float(r["wall_seconds"]) for r in rs)
            out.append(
                f"| {task} | {base} | {method} | {n_good}/{len(rs)} | {n_log}/{len(rs)} | "
                f"{sum(bool(r['diverged']) for r in rs)} | {bad} | "
                f"{_fmt(min(trains), 4)} … {_fmt(max(trains), 4)} | {_fmt(min(helds), 4)} … {_fmt(max(helds), 4)} | "
                f"{ratio_txt} | {below} | {secs:.1f} |"
            )
    return [*out, ""]


def totals_table(records: Sequence[Record]) -> list[str]:
    best = best_baselines(records)
    out = ["## Tower totals per task", "", "| task | tower good | tower_cosine good |", "|---|---|---|"]
    for task in _ordered(records, "task", TASK_ORDER):
        cells = []
        for method in TOWER_METHODS:
            judged = [is_good(r, best) for r in _select(records, task=task, method=method)]
            n = len(judged)
            g = sum(x is True for x in judged)
            cells.append(f"{g}/{n} ({100 * g / n:.0f} %)" if n else "—")
        out.append(f"| {task} | " + " | ".join(cells) + " |")
    return [*out, ""]


def loss_grid(records: Sequence[Record]) -> list[str]:
    best = best_baselines(records)
    out = [
        "## Final train / held-out loss by typed lr (median over seeds; **bold** = good in every seed; "
        "gap = (L − L_best)/(L_init − L_best))",
        "",
    ]
    for task, base in _pairs(records):
        rs = _select(records, task=task, base=base)
        lrs = sorted({float(r["lr"]) for r in rs})
        out.append(f"### {task}, {base}")
        out.append("")
        out.append("| method | " + " | ".join(_lr(x) for x in lrs) + " |")
        out.append("|---|" + "---|" * len(lrs))
        for method in _ordered(rs, "method", METHODS):
            cells = []
            for lr in lrs:
                pts = _select(rs, method=method, lr=lr)
                if not pts:
                    cells.append("")
                    continue
                tr = median_finite([loss_of(r) for r in pts])
                ho = median_finite([math.inf if r["held_out_loss"] is None else r["held_out_loss"] for r in pts])
                gp = median_finite([gap_fraction(r, best) for r in pts])
                txt = f"{_fmt(tr, 4)} / {_fmt(ho, 4)} ({_fmt(gp, 2)})"
                cells.append(f"**{txt}**" if all(is_good(r, best) for r in pts) else txt)
            out.append(f"| {method} | " + " | ".join(cells) + " |")
        out.append("")
    return out


def _a0_at(r: Record, fraction: float) -> float:
    """The sampled step size nearest to ``fraction`` of the run's steps."""
    target = fraction * int(r["steps"])
    _step, a0 = min(((int(s), float(a)) for s, a in r["trajectory"]), key=lambda sa: abs(sa[0] - target))
    return a0


def trajectory_table(records: Sequence[Record]) -> list[str]:
    out = [
        "## Tower step size a0 along training, at fractions of the run (first seed; max = largest sample, its step)",
        "",
    ]
    out.append(
        "| task | base | method | typed lr | "
        + " | ".join(f"{f:.0%}" for f in TRAJECTORY_FRACTIONS)
        + " | final | max (step) | retreats |"
    )
    out.append("|---|---|---|---|" + "---|" * len(TRAJECTORY_FRACTIONS) + "---|---|---|")
    for task, base in _pairs(records):
        for method in TOWER_METHODS:
            rs = _select(records, task=task, base=base, method=method)
            if not rs:
                continue
            seed = min(r["seed"] for r in rs)
            for r in sorted(_select(rs, seed=seed), key=lambda r: r["lr"]):
                step, peak = max(((int(s), float(a)) for s, a in r["trajectory"]), key=lambda sa: sa[1])
                out.append(
                    f"| {task} | {base} | {method} | {_lr(r['lr'])} | "
                    + " | ".join(_fmt(_a0_at(r, f), 2) for f in TRAJECTORY_FRACTIONS)
                    + f" | {_fmt(r['final_step_size'], 2)} | {_fmt(peak, 2)} ({step}) | {r['retreats']} |"
                )
    return [*out, ""]


def schedule_comparison(records: Sequence[Record]) -> list[str]:
    """Every tower run against the tuned warm-up + cosine best of its task, base and seed."""
    cos_best: dict[tuple[str, str, int], Record] = {}
    for r in records:
        if r["method"] == COSINE:
            key = (r["task"], r["base"], r["seed"])
            if key not in cos_best or loss_of(r) < loss_of(cos_best[key]):
                cos_best[key] = r
    if not cos_best:
        return []
    out = ["## Tower against the tuned warm-up + cosine best (train / held-out, per seed)", ""]
    out.append(
        "| task | base | seed | cosine best (lr) | method | typed lr | train Δ | held-out Δ | "
        "within gap of cosine best |"
    )
    out.append("|---|---|---|---|---|---|---|---|---|")
    for (task, base, seed), c in sorted(cos_best.items()):
        thr = loss_of(c) + GAP * (float(c["initial_loss"]) - loss_of(c))
        for r in sorted(
            (r for r in _select(records, task=task, base=base, seed=seed) if r["method"] in TOWER_METHODS),
            key=lambda r: (r["method"], r["lr"]),
        ):
            ho = math.inf if r["held_out_loss"] is None else float(r["held_out_loss"])
            out.append(
                f"| {task} | {base} | {seed} | {_fmt(loss_of(c), 4)} / {_fmt(c['held_out_loss'], 4)} "
                f"({_lr(c['lr'])}) | {r['method']} | {_lr(r['lr'])} | {loss_of(r) - loss_of(c):+.3f} | "
                f"{ho - float(c['held_out_loss']):+.3f} | "
                f"{'yes' if loss_of(r) <= thr else 'no'} |"
            )
    return [*out, ""]


def timing(records: Sequence[Record]) -> list[str]:
    by: dict[str, list[float]] = defaultdict(list)
    for r in records:
        by[r["task"]].append(float(r["wall_seconds"]))
    parts = [f"{t} {statistics.mean(v):.1f} s × {len(v)} runs" for t, v in by.items()]
    total = sum(sum(v) for v in by.values())
    return [
        "## Wall time (1 thread, shared 2-core machine)",
        "",
        "Mean per run: " + "; ".join(parts) + f". Total {total / 60:.0f} min.",
        "",
    ]


def report(records: Sequence[Record]) -> str:
    seeds = sorted({r["seed"] for r in records})
    head = [
        "# Field benchmark",
        "",
        f"Seeds {seeds}; {len(records)} runs. GOOD: final training loss (mean of the last 5 % of steps) "
        f"≤ L_best + {GAP} · (L_init − L_best), L_best the best tuned baseline (fixed or warm-up + cosine) "
        "of the same task, base and seed. Target for the tower's final step size: ≥ 1/30 of the best fixed rate.",
        "",
    ]
    body = (
        totals_table(records)
        + good_table(records)
        + baseline_table(records)
        + schedule_comparison(records)
        + loss_grid(records)
        + trajectory_table(records)
        + timing(records)
    )
    return "\n".join(head + body)


def write_outputs(records: Sequence[Record], out: Path) -> str:
    """Write ``results.md`` and ``field.png`` under ``out``; return the report text."""
    text = report(records)
    (out / "results.md").write_text(text + "\n")
    from .plot import plot

    plot(records, out / "field.png")
    return text
