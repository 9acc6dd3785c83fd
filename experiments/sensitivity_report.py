"""Judge and report the points of the sensitivity benchmark (``sensitivity.py``).

Three criteria, each per task, base and seed against the best fixed-rate point:

- **gap** (primary): final training loss ``L ≤ L_best + 0.05 × (L_init − L_best)``, with
  ``L_init`` the training loss of the seed's model before its first step (every method of a
  task and seed starts from the same weights) and ``L_best`` the best fixed-rate final loss;
- **ratio** (the earlier criterion, kept for comparison): ``L ≤ max(1.25 × L_best, L_best + 0.01)``;
- **held-out gap**: the gap rule on the held-out loss, with its own best fixed-rate final
  held-out loss and its own initial held-out loss.

Points written before the initial held-out loss was recorded get it from the seed's freshly
built task (:func:`fill_initial_test_loss`): the build is a function of the seed, so this is
the very model those points started from.
"""

from __future__ import annotations

import math
import statistics
from collections import defaultdict
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import torch

from stepsize_tower.runner.tolerance import GoodRule
from stepsize_tower.tasks import get_task, task_names

#: ``sgdm`` is SGD with momentum 0.9 (heavy ball), what most SGD training scripts type.
BASES = ("adam", "sgd", "sgdm")
DEFAULT_BASES = ("adam", "sgd")
FIXED = "fixed"
TOWER = "tower"
GAP = GoodRule("gap", gap=0.05)
RATIO = GoodRule("ratio", ratio=1.25, slack=0.01)
AT_BEST_TOLERANCE = 0.05

Record = dict[str, Any]


@dataclass(frozen=True)
class Criterion:
    """A rule on one loss: ``metric`` is the final value's key, ``initial`` the initial value's."""

    name: str
    rule: GoodRule
    metric: str
    initial: str


CRITERIA = (
    Criterion("gap", GAP, "final_loss", "initial_loss"),
    Criterion("ratio", RATIO, "final_loss", "initial_loss"),
    Criterion("held-out gap", GAP, "test_loss", "initial_test_loss"),
)
PRIMARY, OLD, HELD_OUT = CRITERIA


# ---------------------------------------------------------------------------- initial held-out loss


def fill_initial_test_loss(records: Sequence[Record]) -> int:
    """Give points without ``initial_test_loss`` the held-out loss of their seed's fresh model; returns how many."""
    missing = [r for r in records if r.get("initial_test_loss") is None]
    cache: dict[tuple[str, int], float] = {}
    torch.set_num_threads(1)
    for r in missing:
        key = (r["task"], r["seed"])
        if key not in cache:
            with torch.random.fork_rng(devices=[]):
                task = get_task(r["task"]).build(r["seed"])
                cache[key] = float(task.test_loss(task.model))
        r["initial_test_loss"] = cache[key]
    return len(missing)


# ---------------------------------------------------------------------------- judging


def _value(r: Record, key: str) -> float:
    v = r.get(key)
    return math.nan if v is None else float(v)


@dataclass
class Cell:
    """Every point of one task, base and method under one criterion, by seed and lr."""

    loss: dict[int, dict[float, float]] = field(default_factory=lambda: defaultdict(dict))
    good: dict[int, dict[float, bool]] = field(default_factory=lambda: defaultdict(dict))
    a0: dict[int, dict[float, float]] = field(default_factory=lambda: defaultdict(dict))
    retreats: int = 0
    diverged: int = 0
    seconds: float = 0.0

    def count(self, seed: int) -> int:
        """Good points of ``seed``."""
        return sum(self.good[seed].values())


Baselines = dict[tuple[str, str, int], tuple[float, float | None]]
Cells = dict[tuple[str, str, str], Cell]


def baselines(records: Sequence[Record], c: Criterion) -> Baselines:
    """``(L_best, L_init)`` per (task, base, seed): the best fixed-rate point's final and initial value."""
    best: Baselines = {}
    for r in records:
        v = _value(r, c.metric)
        key = (r["task"], r["base"], r["seed"])
        if r["method"] == FIXED and math.isfinite(v) and v < best.get(key, (math.inf, None))[0]:
            best[key] = (v, r.get(c.initial))
    return best


def analyse(records: Sequence[Record], c: Criterion) -> tuple[Baselines, Cells]:
    """The baselines and every point judged under ``c``, per (task, base, method)."""
    best = baselines(records, c)
    cells: Cells = {}
    for r in records:
        cell = cells.setdefault((r["task"], r["base"], r["method"]), Cell())
        v = _value(r, c.metric)
        b, init = best.get((r["task"], r["base"], r["seed"]), (math.nan, None))
        cell.loss[r["seed"]][r["lr"]] = v
        cell.good[r["seed"]][r["lr"]] = c.rule.good(v, b, init)
        cell.a0[r["seed"]][r["lr"]] = float(r["step_sizes"][0][0])
        cell.retreats += int(r["retreats"])
        cell.diverged += int(r["diverged"])
        cell.seconds += float(r["wall_seconds"])
    return best, cells


# ---------------------------------------------------------------------------- formatting helpers


def _fmt(x: float | None, digits: int = 3) -> str:
    if x is None or not math.isfinite(x):
        return "nan"
    return f"{x:.{digits}g}"


def lr_label(lr: float) -> str:
    """``1e-7``, ``1e0``, ``1e1``: a power of ten as the report writes it."""
    return f"1e{round(math.log10(lr)):+d}".replace("+", "")


def methods_of(records: Iterable[Record]) -> list[str]:
    """Fixed first, the tower second, variants after, in order of appearance."""
    seen = list(dict.fromkeys(r["method"] for r in records))
    return [m for m in (FIXED, TOWER) if m in seen] + [m for m in seen if m not in (FIXED, TOWER)]


def ordered(values: Iterable[str], order: Sequence[str]) -> list[str]:
    """``values`` in ``order`` first, the rest sorted."""
    vals = set(values)
    return [v for v in order if v in vals] + sorted(vals - set(order))


def _median_finite(xs: list[float]) -> float:
    finite = [x for x in xs if math.isfinite(x)]
    return statistics.median(finite) if finite else math.nan


def _nan_last(x: float) -> float:
    return x if math.isfinite(x) else math.inf


def _median_nan(xs: list[float]) -> float:
    """Median that counts a diverged (nan) point as the worst value."""
    return statistics.median_high([_nan_last(x) for x in xs]) if xs else math.nan


def _best_lr(losses: dict[float, float]) -> float:
    """The lr with the lowest finite loss (diverged points count as worst)."""
    return min(losses, key=lambda lr: _nan_last(losses[lr]))


@dataclass
class Judged:
    """A sweep's points under every criterion, with its axes."""

    records: Sequence[Record]
    tasks: list[str]
    bases: list[str]
    methods: list[str]
    seeds: list[int]
    lrs: list[float]
    by: dict[str, tuple[Baselines, Cells]]

    @classmethod
    def of(cls, records: Sequence[Record]) -> Judged:
        """Judge ``records`` under :data:`CRITERIA`."""
        return cls(
            records,
            ordered({r["task"] for r in records}, task_names()),
            ordered({r["base"] for r in records}, BASES),
            methods_of(records),
            sorted({r["seed"] for r in records}),
            sorted({r["lr"] for r in records}),
            {c.name: analyse(records, c) for c in CRITERIA},
        )

    def cell(self, c: Criterion, task: str, base: str, method: str) -> Cell | None:
        """The cell of one task, base and method under ``c`` (None when not run)."""
        return self.by[c.name][1].get((task, base, method))

    def good_text(self, c: Criterion, cell: Cell) -> str:
        """``good/points``, with the per-seed counts when there are several seeds."""
        counts = [cell.count(s) for s in self.seeds]
        text = f"{sum(counts)}/{sum(len(cell.good[s]) for s in self.seeds)}"
        return text + (f" ({'/'.join(map(str, counts))})" if len(self.seeds) > 1 else "")


# ---------------------------------------------------------------------------- report


def _header(j: Judged, settings: dict[str, Any]) -> list[str]:
    variants = ", ".join(f"`{k}` = `{v}`" for k, v in settings.get("variants", {}).items()) or "none"
    return [
        "# Sensitivity to the initial step size",
        "",
        f"Seeds {j.seeds}; initial lr {lr_label(j.lrs[0])} … {lr_label(j.lrs[-1])} ({len(j.lrs)} points); "
        f"steps {settings.get('steps') or 'task default'}. Variants: {variants}.",
        "",
        "Criteria, each against the best fixed-rate point of the same task, base and seed:",
        "",
        f"- **gap** (primary): final train loss {GAP.formula()}, L_init the train loss of the seed's model "
        "before its first step (the same weights for every method);",
        f"- **ratio** (the earlier criterion, for comparison): final train loss {RATIO.formula()};",
        f"- **held-out gap**: final held-out loss {GAP.formula()}, with the held-out loss's own best fixed-rate "
        "point and initial value.",
        "",
    ]


def _main_row(j: Judged, task: str, base: str, method: str) -> str | None:
    cell = j.cell(PRIMARY, task, base, method)
    if cell is None:
        return None
    old, held = j.cell(OLD, task, base, method), j.cell(HELD_OUT, task, base, method)
    assert old is not None and held is not None
    fixed = j.cell(PRIMARY, task, base, FIXED)
    best = j.by[PRIMARY.name][0]
    ends = " / ".join(
        f"{sum(cell.good[s].get(lr, False) for s in j.seeds)}/{len(j.seeds)}" for lr in (j.lrs[0], j.lrs[-1])
    )
    ratios_best, ratios_at = [], []
    for s in j.seeds:
        b = best.get((task, base, s), (math.nan, None))[0]
        own = [x for x in cell.loss[s].values() if math.isfinite(x)]
        ratios_best.append(min(own) / b if own and b > 0 else math.nan)
        if fixed is not None and method != FIXED:
            lr_star = _best_lr(fixed.loss[s])
            at_best = fixed.loss[s][lr_star]  # 0 where the fixed rate fits exactly: no ratio
            ratios_at.append(cell.loss[s].get(lr_star, math.nan) / at_best if at_best > 0 else math.nan)
    rb = _median_finite(ratios_best)
    best_txt = "—" if method == FIXED else f"{_fmt(rb)}{' (beats)' if rb < 1 else ''}"
    at_txt = "—"
    if method != FIXED and ratios_at:
        ra = _median_finite(ratios_at)
        at_txt = f"{_fmt(ra)} ({'within' if abs(ra - 1) <= AT_BEST_TOLERANCE else 'outside'} 5%)"
    bad = ", ".join(lr_label(lr) for lr in j.lrs if not all(cell.good[s].get(lr, False) for s in j.seeds)) or "—"
    a0s = [cell.a0[s][lr] for s in j.seeds for lr in cell.a0[s]]
    a0_txt = "—" if method == FIXED else f"{_fmt(min(a0s), 2)} … {_fmt(max(a0s), 2)}"
    return (
        f"| {task} | {base} | {method} | {j.good_text(PRIMARY, cell)} | {j.good_text(OLD, old)} | "
        f"{j.good_text(HELD_OUT, held)} | {ends} | {best_txt} | {at_txt} | {cell.diverged} | {bad} | {a0_txt} | "
        f"{cell.retreats if method != FIXED else '—'} | {cell.seconds:.1f} |"
    )


def _main_table(j: Judged) -> list[str]:
    out = [
        "## Good points per task and base",
        "",
        "Counts are good/points (per seed in brackets). Ends, not good at, best and at-best columns use the gap.",
        "",
        "| task | base | method | good (gap) | good (ratio) | held-out good (gap) | ends 1e-7 / 10 | "
        "best ÷ best fixed | at best fixed lr ÷ fixed | diverged | not good at lr | final a0 range | retreats | "
        "time s |",
        "|---|---|---|---|---|---|---|---|---|---|---|---|---|---|",
    ]
    for task in j.tasks:
        for base in j.bases:
            out += [row for m in j.methods if (row := _main_row(j, task, base, m)) is not None]
    return [*out, ""]


def totals(j: Judged, c: Criterion) -> dict[tuple[str, str], tuple[int, int]]:
    """``(good, points)`` per (method, base) under ``c``, over tasks and seeds."""
    out: dict[tuple[str, str], tuple[int, int]] = {}
    for (_task, base, method), cell in j.by[c.name][1].items():
        g, n = out.get((method, base), (0, 0))
        out[(method, base)] = (g + sum(cell.count(s) for s in j.seeds), n + sum(len(cell.good[s]) for s in j.seeds))
    return out


def _totals_table(j: Judged) -> list[str]:
    out = ["## Totals", "", "| criterion | method | " + " | ".join(j.bases) + " | all | per seed (all bases) |"]
    out.append("|---|---|" + "---|" * (len(j.bases) + 2))
    for c in CRITERIA:
        tot = totals(j, c)
        for method in j.methods:
            row = [c.name, method]
            g_all = n_all = 0
            for base in j.bases:
                g, n = tot.get((method, base), (0, 0))
                g_all, n_all = g_all + g, n_all + n
                row.append(f"{g}/{n} ({100 * g / max(n, 1):.0f}%)")
            row.append(f"{g_all}/{n_all} ({100 * g_all / max(n_all, 1):.0f}%)")
            cells = [cell for (_, _, m), cell in j.by[c.name][1].items() if m == method]
            ps = [sum(cell.count(s) for cell in cells) for s in j.seeds]
            row.append("/".join(map(str, ps)))
            out.append("| " + " | ".join(row) + " |")
    return [*out, ""]


#: A point's place: task, base, seed, lr.
Point = tuple[str, str, int, float]


def disagreements(j: Judged, method: str) -> tuple[list[Point], list[Point]]:
    """Points of ``method`` good under the ratio but not the gap, and the reverse: (task, base, seed, lr)."""
    gap, ratio = j.by[PRIMARY.name][1], j.by[OLD.name][1]
    ratio_only: list[Point] = []
    gap_only: list[Point] = []
    for key, cell in gap.items():
        if key[2] != method:
            continue
        for s in j.seeds:
            for lr, ok in cell.good[s].items():
                old = ratio[key].good[s][lr]
                if old and not ok:
                    ratio_only.append((key[0], key[1], s, lr))
                elif ok and not old:
                    gap_only.append((key[0], key[1], s, lr))
    return ratio_only, gap_only


def _disagreement_text(j: Judged) -> list[str]:
    out = ["## Where the two criteria disagree", ""]
    for method in j.methods:
        ratio_only, gap_only = disagreements(j, method)
        pts = "; ".join(f"{t} {b} seed {s} lr {lr_label(lr)}" for t, b, s, lr in ratio_only) or "none"
        out.append(
            f"- {method}: {len(ratio_only)} points good under the ratio but not the gap ({pts}); "
            f"{len(gap_only)} good under the gap but not the ratio."
        )
    return [*out, ""]


def _grid(j: Judged, c: Criterion, title: str) -> list[str]:
    out = [f"## {title}", "", "| task | base | method | " + " | ".join(lr_label(lr) for lr in j.lrs) + " |"]
    out.append("|---|---|---|" + "---|" * len(j.lrs))
    for task in j.tasks:
        for base in j.bases:
            for method in j.methods:
                cell = j.cell(c, task, base, method)
                if cell is None:
                    continue
                vals = []
                for lr in j.lrs:
                    txt = _fmt(_median_nan([cell.loss[s].get(lr, math.nan) for s in j.seeds]))
                    vals.append(f"**{txt}**" if all(cell.good[s].get(lr, False) for s in j.seeds) else txt)
                out.append(f"| {task} | {base} | {method} | " + " | ".join(vals) + " |")
    return [*out, ""]


def report(records: Sequence[Record], settings: dict[str, Any]) -> str:
    """The Markdown report of a sweep (``initial_test_loss`` must be present; see :func:`fill_initial_test_loss`)."""
    j = Judged.of(records)
    out = _header(j, settings) + _main_table(j) + _totals_table(j) + _disagreement_text(j)
    out += _grid(j, PRIMARY, "Final train loss by initial lr (median over seeds; **bold** = gap-good in every seed)")
    out += _grid(
        j, HELD_OUT, "Final held-out loss by initial lr (median over seeds; **bold** = held-out-gap-good in every seed)"
    )
    by_method: dict[str, float] = defaultdict(float)
    for r in records:
        by_method[r["method"]] += float(r["wall_seconds"])
    elapsed = (
        f". Elapsed: {settings['elapsed_seconds']:.0f} s with {settings['workers']} workers."
        if "elapsed_seconds" in settings
        else "."
    )
    out += ["## Wall time", "", "Summed over points (build + train + evaluate): "]
    out[-1] += ", ".join(f"{m} {by_method[m]:.0f} s" for m in j.methods) + elapsed
    return "\n".join([*out, ""])


# ---------------------------------------------------------------------------- plot


def plot(records: Sequence[Record], path: Path) -> None:
    """Final loss vs initial lr per task (columns) and base (rows); seed spread as a band; both thresholds."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    j = Judged.of(records)
    initial = {(r["task"], r["seed"]): r["initial_loss"] for r in records if r["initial_loss"] is not None}
    fig, axes = plt.subplots(
        len(j.bases), len(j.tasks), figsize=(3.6 * len(j.tasks), 3.2 * len(j.bases)), squeeze=False
    )
    colors = {FIXED: "black", TOWER: "tab:red"}
    palette = iter(["tab:blue", "tab:green", "tab:purple", "tab:orange", "tab:brown", "tab:pink", "tab:olive"])
    for m in j.methods:
        colors.setdefault(m, next(palette, "tab:gray"))
    for i, base in enumerate(j.bases):
        for k, task in enumerate(j.tasks):
            ax = axes[i][k]
            inits = [v for (t, _s), v in initial.items() if t == task]
            _plot_panel(ax, j, task, base, colors, 3 * max(inits) if inits else None)
            ax.set_title(f"{task} · {base}", fontsize=9)
            if i == len(j.bases) - 1:
                ax.set_xlabel("initial lr", fontsize=8)
            if k == 0:
                ax.set_ylabel("final train loss", fontsize=8)
    axes[0][0].legend(fontsize=7)
    fig.suptitle(
        "Final train loss vs initial step size (x: diverged; ^: above 3 × initial loss, clipped; band: seed min–max)",
        fontsize=10,
    )
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


def _plot_panel(ax: Any, j: Judged, task: str, base: str, colors: dict[str, str], top: float | None) -> None:
    finite_all = [
        x
        for m in j.methods
        if (cell := j.cell(PRIMARY, task, base, m)) is not None
        for s in j.seeds
        for x in cell.loss[s].values()
        if math.isfinite(x)
    ]
    top = top if top is not None else max(finite_all or [1.0])
    bottom = 0.5 * min(finite_all) if finite_all else 1e-3
    for method in j.methods:
        cell = j.cell(PRIMARY, task, base, method)
        if cell is None:
            continue
        lrs = sorted({lr for s in j.seeds for lr in cell.loss[s]})
        per_lr = [[cell.loss[s].get(lr, math.nan) for s in j.seeds] for lr in lrs]
        clipped = [[min(x, top) if math.isfinite(x) else top for x in xs] for xs in per_lr]
        ax.plot(lrs, [statistics.median(xs) for xs in clipped], "-" if method != FIXED else "--", marker="o", ms=3,
                color=colors[method], label=method)  # fmt: skip
        if len(j.seeds) > 1:
            lo, hi = [min(xs) for xs in clipped], [max(xs) for xs in clipped]
            ax.fill_between(lrs, lo, hi, color=colors[method], alpha=0.2)
        nan_lrs = [lr for lr, xs in zip(lrs, per_lr, strict=True) if any(not math.isfinite(x) for x in xs)]
        off_lrs = [lr for lr, xs in zip(lrs, per_lr, strict=True) if any(math.isfinite(x) and x > top for x in xs)]
        ax.plot(nan_lrs, [top] * len(nan_lrs), "x", color=colors[method], ms=7)
        ax.plot(off_lrs, [top] * len(off_lrs), "^", color=colors[method], ms=5)
    for c, style in ((PRIMARY, ":"), (OLD, "-.")):
        best = j.by[c.name][0]
        thr = [c.rule.threshold(*best[(task, base, s)]) for s in j.seeds if (task, base, s) in best]
        thr = [x for x in thr if math.isfinite(x)]
        if thr:
            ax.axhline(statistics.median(thr), color="gray", lw=0.8, ls=style, label=f"{c.name} threshold")
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_ylim(bottom, top * 1.5)
    ax.tick_params(labelsize=7)
