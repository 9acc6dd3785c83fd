"""``field.png``: final training loss vs typed lr, one column per task, one row per base family."""

from __future__ import annotations

import math
from collections.abc import Sequence
from pathlib import Path

from .judge import best_baselines, loss_of, median_finite
from .methods import COSINE, FIXED, METHODS, TASK_ORDER, TOWER, TOWER_COSINE
from .points import Record

STYLE = {
    FIXED: ("black", "o", "fixed lr"),
    COSINE: ("tab:blue", "s", "warm-up + cosine"),
    TOWER: ("tab:red", "^", "tower"),
    TOWER_COSINE: ("tab:orange", "v", "tower + warm-up/cosine"),
}
FAMILIES = (("Adam / AdamW", ("adam", "adamw")), ("SGD", ("sgd",)))


def _panel(ax, records: Sequence[Record], task: str, bases: tuple[str, ...]) -> None:
    rs = [r for r in records if r["task"] == task and r["base"] in bases]
    if not rs:
        ax.set_visible(False)
        return
    best = best_baselines(records)
    keys = [k for k in best if k[0] == task and k[1] in bases]
    thr = median_finite([best[k].threshold() for k in keys]) if keys else math.nan
    inits = [float(r["initial_loss"]) for r in rs if r.get("initial_loss") is not None]
    top = max(inits) * 1.05 if inits else None
    for method in METHODS:
        pts = sorted({float(r["lr"]) for r in rs if r["method"] == method})
        if not pts:
            continue
        ys = [median_finite([loss_of(r) for r in rs if r["method"] == method and r["lr"] == lr]) for lr in pts]
        ys = [y if math.isfinite(y) and (top is None or y < top) else (top or y) for y in ys]
        color, marker, label = STYLE[method]
        ax.plot(pts, ys, marker=marker, color=color, label=label, lw=1.2, ms=4)
    if math.isfinite(thr):
        ax.axhline(thr, color="gray", ls="--", lw=0.8, label="5 % gap")
    ax.set_xscale("log")
    if task == "lsq_raw":
        ax.set_yscale("log")
    if top is not None and task != "lsq_raw":
        ax.set_ylim(top=top)
    ax.set_title(f"{task} ({'/'.join(sorted({r['base'] for r in rs}))})", fontsize=9)
    ax.set_xlabel("typed lr")
    ax.set_ylabel("final train loss")


def plot(records: Sequence[Record], path: Path) -> None:
    """Median over seeds; diverged points drawn at the top of the axis (the initial loss)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    tasks = [t for t in TASK_ORDER if any(r["task"] == t for r in records)]
    fig, axes = plt.subplots(2, len(tasks), figsize=(4 * len(tasks), 6.5), squeeze=False)
    for j, task in enumerate(tasks):
        for i, (_name, bases) in enumerate(FAMILIES):
            _panel(axes[i][j], records, task, bases)
    handles, labels = [], []
    for ax in axes.flat:
        for h, lab in zip(*ax.get_legend_handles_labels(), strict=True):
            if lab not in labels:
                handles.append(h)
                labels.append(lab)
    fig.legend(handles, labels, loc="lower center", ncol=len(labels), fontsize=8)
    fig.tight_layout(rect=(0, 0.05, 1, 1))
    fig.savefig(path, dpi=110)
    plt.close(fig)
