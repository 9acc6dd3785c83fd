"""The sweep report: Markdown and a self-contained HTML page with PNG plots.

Sections: the band table (per configuration, how many initial step sizes end within the
recipe's tolerance of the best fixed-rate result), the final metric by initial step size,
the plots (final metric vs initial step size with seed spread, learned step-size
trajectories per level, wall time per trial) and the failed trials.
"""

from __future__ import annotations

import base64
import html
import math
import statistics
from collections import defaultdict
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .schema import load_recipe
from .store import ResultStore
from .trials import Trial, expand_trials

__all__ = ["REPORT_FOLDER", "Series", "collect", "write_report"]

REPORT_FOLDER = "report"
Record = dict[str, Any]


@dataclass
class Series:
    """All trials of one configuration, depth and choice of swept options."""

    label: str
    kind: str
    depth: int
    swept: str
    records: list[Record] = field(default_factory=list)

    def by_seed(self, metric: str) -> dict[int, dict[float, float]]:
        """``{seed: {lr: metric}}`` (``nan`` when the metric is missing or not finite)."""
        out: dict[int, dict[float, float]] = defaultdict(dict)
        for r in self.records:
            value = r["metrics"].get(metric)
            out[r["trial"]["seed"]][r["trial"]["lr"]] = math.nan if value is None else float(value)
        return out


def _series_key(t: Trial) -> tuple[str, int, str]:
    return t.optimizer, t.depth, ", ".join(f"{k}={v}" for k, v in t.swept.items())


def collect(folder: Path) -> tuple[Any, list[Trial], list[Series], list[Record]]:
    """The resolved recipe, its trials, the finished series and the failed records of ``folder``."""
    loaded = load_recipe(folder / "recipe.yaml")
    trials = expand_trials(loaded.recipe)
    latest = ResultStore(folder).latest()
    series: dict[tuple[str, int, str], Series] = {}
    failed: list[Record] = []
    for t in trials:
        key = _series_key(t)
        s = series.setdefault(
            key, Series(f"{t.optimizer}" + (f" d{t.depth}" if t.kind == "tower" else ""), t.kind, t.depth, key[2])
        )
        rec = latest.get(t.trial_id)
        if rec is None:
            continue
        if rec.get("status") == "ok":
            s.records.append(rec)
        else:
            failed.append(rec)
    return loaded.recipe, trials, [s for s in series.values() if s.records], failed


def _nan_last(x: float) -> float:
    return x if math.isfinite(x) else math.inf


def _fmt(x: float | None, digits: int = 3) -> str:
    if x is None or not math.isfinite(x):
        return "—"
    return f"{x:.{digits}g}"


def _best_fixed(series: Sequence[Series], metric: str) -> dict[tuple[str, int], float]:
    """Best fixed-rate value per (swept options, seed); every configuration when none is fixed."""
    pool = [s for s in series if s.kind == "fixed"] or list(series)
    best: dict[tuple[str, int], float] = {}
    for s in pool:
        for seed, row in s.by_seed(metric).items():
            for v in row.values():
                if math.isfinite(v):
                    best[(s.swept, seed)] = min(best.get((s.swept, seed), math.inf), v)
    return best


def _good(value: float, best: float, ratio: float, slack: float) -> bool:
    return math.isfinite(value) and math.isfinite(best) and value <= max(ratio * best, best + slack)


@dataclass
class _Tables:
    band: list[list[str]]
    grid: list[list[str]]
    best: list[list[str]]
    failed: list[list[str]]


def _tables(recipe: Any, series: Sequence[Series], failed: Sequence[Record]) -> _Tables:
    tol = recipe.tolerance
    metric = tol.metric
    lrs = recipe.sweep.lrs()
    best = _best_fixed(series, metric)
    extra = [m for m in ("train_loss", "test_loss", *recipe.task.metrics) if m != metric]
    band = [
        ["configuration", "options", "good lrs (every seed)", "per seed", "good range", "diverged", "wall s (median)"]
    ]
    grid = [["configuration", "options", *[f"{lr:.3g}" for lr in lrs]]]
    best_rows = [["configuration", "options", "best lr", metric, *extra]]
    for s in series:
        rows = s.by_seed(metric)
        seeds = sorted(rows)
        good = {
            seed: {
                lr
                for lr, v in rows[seed].items()
                if _good(v, best.get((s.swept, seed), math.nan), tol.ratio, tol.slack)
            }
            for seed in seeds
        }
        everywhere = [lr for lr in lrs if all(lr in good[seed] for seed in seeds) and any(lr in rows[x] for x in seeds)]
        span = f"{min(everywhere):.3g} … {max(everywhere):.3g}" if everywhere else "—"
        diverged = sum(1 for r in s.records if r.get("diverged"))
        walls = [r["wall_seconds"] for r in s.records if r.get("wall_seconds") is not None]
        band.append(
            [
                s.label,
                s.swept or "—",
                f"{len(everywhere)}/{len(lrs)}",
                " / ".join(str(len(good[seed])) for seed in seeds),
                span,
                str(diverged),
                _fmt(statistics.median(walls) if walls else None, 2),
            ]
        )
        cells = []
        for lr in lrs:
            vals = [rows[seed][lr] for seed in seeds if lr in rows[seed]]
            med = statistics.median_high([_nan_last(v) for v in vals]) if vals else math.nan
            mark = all(lr in good[seed] for seed in seeds) and bool(vals)
            cells.append(("**" + _fmt(med) + "**") if mark else _fmt(med))
        grid.append([s.label, s.swept or "—", *cells])
        medians = {
            lr: statistics.median_high([_nan_last(rows[x][lr]) for x in seeds if lr in rows[x]])
            for lr in lrs
            if any(lr in rows[x] for x in seeds)
        }
        lr_star = min(medians, key=lambda k: medians[k])
        at = [r for r in s.records if r["trial"]["lr"] == lr_star]
        others = []
        for m in extra:
            vs = [r["metrics"].get(m) for r in at]
            fin = [v for v in vs if v is not None]
            others.append(_fmt(statistics.median(fin)) if fin else "—")
        best_rows.append([s.label, s.swept or "—", f"{lr_star:.3g}", _fmt(medians[lr_star]), *others])
    fail_rows = [["trial", "configuration", "lr", "seed", "error (last line)"]]
    for r in failed:
        t = r.get("trial", {})
        last = (r.get("error") or "").strip().splitlines()[-1:] or [""]
        fail_rows.append(
            [r["trial_id"], str(t.get("optimizer")), f"{t.get('lr', math.nan):.3g}", str(t.get("seed")), last[0][:200]]
        )
    return _Tables(band, grid, best_rows, fail_rows)


# ---------------------------------------------------------------------------- plots


def _plots(recipe: Any, series: Sequence[Series], out: Path) -> list[tuple[str, str]]:
    """Write the PNG plots into ``out``; returns ``(file name, caption)`` pairs."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    metric = recipe.tolerance.metric
    tol = recipe.tolerance
    files: list[tuple[str, str]] = []
    colors = plt.rcParams["axes.prop_cycle"].by_key()["color"]
    sweeps = list(dict.fromkeys(s.swept for s in series))
    best = _best_fixed(series, metric)

    # 1. final metric vs initial lr, median and seed spread
    fig, axes = plt.subplots(1, len(sweeps), figsize=(6.0 * len(sweeps), 4.2), squeeze=False)
    for ax, swept in zip(axes[0], sweeps, strict=True):
        for i, s in enumerate(x for x in series if x.swept == swept):
            rows = s.by_seed(metric)
            lrs = sorted({lr for row in rows.values() for lr in row})
            vals = [[rows[seed].get(lr, math.nan) for seed in rows] for lr in lrs]
            fin = [[v for v in vs if math.isfinite(v)] for vs in vals]
            med = [statistics.median(v) if v else math.nan for v in fin]
            style = "--" if s.kind == "fixed" else "-"
            c = colors[i % len(colors)]
            ax.plot(lrs, med, style, marker="o", color=c, label=s.label)
            lo = [min(v) if v else math.nan for v in fin]
            hi = [max(v) if v else math.nan for v in fin]
            ax.fill_between(lrs, lo, hi, color=c, alpha=0.15)
        bests = [v for (sw, _), v in best.items() if sw == swept]
        if bests:
            b = statistics.median(bests)
            ax.axhline(max(tol.ratio * b, b + tol.slack), color="gray", lw=0.8, ls=":", label="tolerance band")
        ax.set_xscale("log")
        ax.set_yscale("log")
        ax.set_xlabel("initial step size")
        ax.set_ylabel(f"final {metric}")
        ax.set_title(swept or recipe.name)
        ax.legend(fontsize=8)
    fig.tight_layout()
    fig.savefig(out / "final_vs_lr.png", dpi=110)
    plt.close(fig)
    files.append(("final_vs_lr.png", f"Final {metric} vs initial step size: median over seeds, band = min…max."))

    # 2. learned step sizes per level (first seed; one line per initial lr)
    towers = [s for s in series if s.kind == "tower" and s.depth > 0][:8]
    if towers:
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
                    ys = [p["step_sizes"][0][k] for p in traj]
                    ax = axes[row][k]
                    ax.plot(
                        steps,
                        ys,
                        color=cmap(j / max(len(recs) - 1, 1)),
                        lw=1,
                        label=f"lr {r['trial']['lr']:.3g}" if k == 0 else None,
                    )
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
        files.append(
            ("step_sizes.png", "Learned step size a_k per level (group 0, first seed), one line per initial lr.")
        )

    # 3. wall time per trial
    fig, ax = plt.subplots(figsize=(max(4.0, 1.2 * len(series)), 3.4))
    data = [[r["wall_seconds"] for r in s.records if r.get("wall_seconds") is not None] for s in series]
    ax.boxplot(data, showfliers=True)
    ax.set_xticks(range(1, len(series) + 1), [f"{s.label}\n{s.swept}".strip() for s in series], fontsize=8)
    ax.set_ylabel("wall seconds per trial")
    fig.tight_layout()
    fig.savefig(out / "wall_time.png", dpi=100)
    plt.close(fig)
    files.append(("wall_time.png", "Wall time per trial (build, train, evaluate, log)."))
    return files


# ---------------------------------------------------------------------------- rendering


def _md_table(rows: list[list[str]]) -> str:
    head, *body = rows
    lines = ["| " + " | ".join(head) + " |", "|" + "---|" * len(head)]
    lines += ["| " + " | ".join(r) + " |" for r in body]
    return "\n".join(lines)


def _html_table(rows: list[list[str]]) -> str:
    def cell(text: str, tag: str) -> str:
        bold = text.startswith("**") and text.endswith("**") and len(text) > 4
        inner = html.escape(text[2:-2] if bold else text)
        return f"<{tag}>{'<b>' + inner + '</b>' if bold else inner}</{tag}>"

    head, *body = rows
    out = ["<table>", "<tr>" + "".join(cell(h, "th") for h in head) + "</tr>"]
    out += ["<tr>" + "".join(cell(c, "td") for c in r) + "</tr>" for r in body]
    out.append("</table>")
    return "\n".join(out)


_CSS = (
    "body{font-family:system-ui,sans-serif;max-width:1100px;margin:2em auto;padding:0 1em;color:#222}"
    "table{border-collapse:collapse;margin:1em 0;font-size:14px}"
    "td,th{border:1px solid #ccc;padding:3px 8px;text-align:right}th{background:#f3f3f3}"
    "td:first-child,th:first-child{text-align:left}img{max-width:100%}figcaption{color:#555;font-size:13px}"
)


def write_report(folder: str | Path) -> list[Path]:
    """Write ``report.md``, ``report.html`` and the plots into ``folder/report``; returns the paths."""
    folder = Path(folder)
    recipe, trials, series, failed = collect(folder)
    out = folder / REPORT_FOLDER
    out.mkdir(parents=True, exist_ok=True)
    done = sum(len(s.records) for s in series)
    tol = recipe.tolerance
    intro = (
        f"{done} of {len(trials)} trials finished, {len(failed)} failed. Task: "
        + ", ".join(f"{k}={v}" for k, v in vars(recipe.task).items() if v not in (None, {}, [], ""))
        + f". A result is good when its final {tol.metric} ≤ max({tol.ratio} × best, best + {tol.slack}), "
        "best being the best fixed-rate result of the same seed."
    )
    if not series:
        (out / "report.md").write_text(f"# {recipe.name}\n\n{intro}\n\nNo finished trials yet.\n")
        (out / "report.html").write_text(
            f"<!doctype html><meta charset=utf-8><title>{html.escape(recipe.name)}</title>"
            f"<h1>{html.escape(recipe.name)}</h1><p>{html.escape(intro)}</p>"
            "<p>No finished trials yet.</p>"
        )
        return [out / "report.md", out / "report.html"]
    tables = _tables(recipe, series, failed)
    plots = _plots(recipe, series, out)
    sections: list[tuple[str, str, list[list[str]] | None]] = [
        ("Band: initial step sizes within tolerance of the best fixed rate", "", tables.band),
        (f"Final {tol.metric} by initial step size (median over seeds; bold: good for every seed)", "", tables.grid),
        ("Each configuration at its best initial step size (median over seeds)", "", tables.best),
    ]
    if failed:
        sections.append(
            ("Failed trials (tracebacks in results.jsonl; they are retried by the next run)", "", tables.failed)
        )
    md = [f"# {recipe.name}", "", recipe.description, "", intro, ""]
    page = [
        f"<!doctype html><html><head><meta charset='utf-8'><title>{html.escape(recipe.name)}</title>"
        f"<style>{_CSS}</style></head><body>",
        f"<h1>{html.escape(recipe.name)}</h1>",
        f"<p>{html.escape(recipe.description)}</p><p>{html.escape(intro)}</p>",
    ]
    for title, _, rows in sections:
        md += [f"## {title}", "", _md_table(rows or []), ""]
        page += [f"<h2>{html.escape(title)}</h2>", _html_table(rows or [])]
    md += ["## Plots", ""]
    page.append("<h2>Plots</h2>")
    for name, caption in plots:
        md += [f"![{caption}]({name})", "", caption, ""]
        data = base64.b64encode((out / name).read_bytes()).decode()
        page.append(
            f"<figure><img src='data:image/png;base64,{data}' alt='{html.escape(caption)}'>"
            f"<figcaption>{html.escape(caption)}</figcaption></figure>"
        )
    page.append("</body></html>")
    (out / "report.md").write_text("\n".join(md))
    (out / "report.html").write_text("\n".join(page))
    return [out / "report.md", out / "report.html", *(out / name for name, _ in plots)]
