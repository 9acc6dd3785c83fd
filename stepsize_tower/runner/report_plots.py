"""The sweep report's plots: final metric vs initial step size, learned step sizes, wall time.

Each writes one PNG into the report folder; :func:`write_plots` returns ``(file name,
caption)`` pairs in the order the report shows them.
"""

from __future__ import annotations

import math
import statistics
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from .report import Judge, Series

__all__ = ["write_plots"]


def write_plots(recipe: Any, series: Sequence[Series], judge: Judge, out: Path) -> list[tuple[str, str]]:
    """Write the PNG plots into ``out``; returns ``(file name, caption)`` pairs."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    files = [_final_vs_lr(plt, recipe, series, judge, out)]
    towers = [s for s in series if s.kind == "tower" and s.depth > 0][:8]
    if towers:
        files.append(_step_sizes(plt, towers, out))
    files.append(_wall_time(plt, series, out))
    return files


def _final_vs_lr(plt: Any, recipe: Any, series: Sequence[Series], judge: Judge, out: Path) -> tuple[str, str]:
    """Final metric vs initial lr, median and seed spread, with the good threshold (median over seeds)."""
    metric = judge.metric
    colors = plt.rcParams["axes.prop_cycle"].by_key()["color"]
    sweeps = list(dict.fromkeys(s.swept for s in series))
    fig, axes = plt.subplots(1, len(sweeps), figsize=(6.0 * len(sweeps), 4.2), squeeze=False)
    for ax, swept in zip(axes[0], sweeps, strict=True):
        for i, s in enumerate(x for x in series if x.swept == swept):
            rows = s.by_seed(metric)
            lrs = sorted({lr for row in rows.values() for lr in row})
            vals = [[rows[seed].get(lr, math.nan) for seed in rows] for lr in lrs]
            fin = [[v for v in vs if math.isfinite(v)] for vs in vals]
            med = [statistics.median(v) if v else math.nan for v in fin]
            c = colors[i % len(colors)]
            ax.plot(lrs, med, "--" if s.kind == "fixed" else "-", marker="o", color=c, label=s.label)
            lo = [min(v) if v else math.nan for v in fin]
            hi = [max(v) if v else math.nan for v in fin]
            ax.fill_between(lrs, lo, hi, color=c, alpha=0.15)
        limits = [judge.rule.threshold(b, init) for (sw, _), (b, init) in judge.baselines.items() if sw == swept]
        limits = [x for x in limits if math.isfinite(x)]
        if limits:
            label = f"good threshold ({judge.rule.formula()})"
            ax.axhline(statistics.median(limits), color="gray", lw=0.8, ls=":", label=label)
        ax.set_xscale("log")
        ax.set_yscale("log")
        ax.set_xlabel("initial step size")
        ax.set_ylabel(f"final {metric}")
        ax.set_title(swept or recipe.name)
        ax.legend(fontsize=8)
    fig.tight_layout()
    fig.savefig(out / "final_vs_lr.png", dpi=110)
    plt.close(fig)
    return "final_vs_lr.png", f"Final {metric} vs initial step size: median over seeds, band = min…max."


def _step_sizes(plt: Any, towers: Sequence[Series], out: Path) -> tuple[str, str]:
    """Learned step sizes per level (first seed; one line per initial lr)."""
    cols = max(s.depth for s in towers) + 1
    fig, axes = plt.subplots(len(towers), cols, figsize=(3.6 * cols, 2.8 * len(towers)), squeeze=False)
    cmap = plt.get_cmap("viridis")
    for row, s in enumerate(towers):
        seed = min(r["trial"]["seed"] for r in s.records)
        recs = sorted((r for r in s.records if r["trial"]["seed"] == seed), key=lambda r: r["trial"]["lr"])
        for j, r in enumerate(recs):
            traj = r.get("trajectory") or []
            steps = [p["step"] for p in traj]
            for k in range(s.depth + 1):
                label = f"lr {r['trial']['lr']:.3g}" if k == 0 else None
                ys = [p["step_sizes"][0][k] for p in traj]
                axes[row][k].plot(steps, ys, color=cmap(j / max(len(recs) - 1, 1)), lw=1, label=label)
        for k in range(cols):
            ax = axes[row][k]
            if k > s.depth:
                ax.axis("off")
                continue
            ax.set_yscale("log")
            ax.set_title(f"{s.label} {s.swept} · level {k}".strip(), fontsize=9)
            ax.set_xlabel("step")
        axes[row][0].legend(fontsize=6)
    fig.tight_layout()
    fig.savefig(out / "step_sizes.png", dpi=100)
    plt.close(fig)
    return "step_sizes.png", "Learned step size a_k per level (group 0, first seed), one line per initial lr."


def _wall_time(plt: Any, series: Sequence[Series], out: Path) -> tuple[str, str]:
    """Wall time per trial, start-up excluded (``wall_seconds``; see :func:`~.execute.run_trial`)."""
    fig, ax = plt.subplots(figsize=(max(4.0, 1.2 * len(series)), 3.4))
    data = [[r["wall_seconds"] for r in s.records if r.get("wall_seconds") is not None] for s in series]
    ax.boxplot(data, showfliers=True)
    ax.set_xticks(range(1, len(series) + 1), [f"{s.label}\n{s.swept}".strip() for s in series], fontsize=8)
    ax.set_ylabel("wall seconds per trial")
    fig.tight_layout()
    fig.savefig(out / "wall_time.png", dpi=100)
    plt.close(fig)
    return "wall_time.png", (
        "Wall time per trial: training, final evaluation and logging, from the end of the trial's own set-up "
        "(imports, task and optimizer build: setup_seconds in results.jsonl, not counted here)."
    )
