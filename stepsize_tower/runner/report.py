"""The sweep report: Markdown and a self-contained HTML page with PNG plots.

Sections: the band table (per configuration, how many initial step sizes end within the
recipe's tolerance of the best fixed-rate result, the good ones as runs of grid neighbours,
and the count under the same rule on the other loss: held-out beside training), the final
metric and the other loss by initial step size, the plots (final metric vs initial step size
with seed spread, learned step-size trajectories per level, wall time per trial) and the
failed trials.
"""

from __future__ import annotations

import base64
import html
import math
import statistics
from collections import defaultdict
from collections.abc import Collection, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .report_plots import write_plots
from .schema import load_recipe
from .store import ResultStore
from .tolerance import GoodRule
from .trials import Trial, expand_trials

__all__ = ["REPORT_FOLDER", "Judge", "Series", "collect", "lr_runs", "write_report"]

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


def lr_runs(lrs: Sequence[float], good: Collection[float]) -> str:
    """The good step sizes as runs of grid neighbours, such as ``1e-06 … 0.001, 0.1`` (``—``: none).

    Runs follow the sorted grid ``lrs``: a bad step size between two good ones splits them.
    """
    runs: list[list[float]] = []
    previous = False
    for lr in sorted(lrs):
        now = lr in good
        if now and previous:
            runs[-1].append(lr)
        elif now:
            runs.append([lr])
        previous = now
    return ", ".join(f"{r[0]:.3g}" if len(r) == 1 else f"{r[0]:.3g} … {r[-1]:.3g}" for r in runs) or "—"


def _initial(record: Record, metric: str) -> float | None:
    """``L_init``: the record's ``metric`` before the first step (older records hold only the training loss)."""
    value = (record.get("initial_metrics") or {}).get(metric)
    if value is None and metric == "train_loss":
        value = record.get("initial_loss")
    return None if value is None else float(value)


@dataclass
class Judge:
    """The recipe's rule on one metric, with the baseline of every (swept options, seed).

    ``baselines[(swept, seed)] = (L_best, L_init)``: the best fixed-rate final value (every
    configuration's when none is fixed) and the initial value recorded by that best trial.
    """

    rule: GoodRule
    metric: str
    baselines: dict[tuple[str, int], tuple[float, float | None]]

    @classmethod
    def of(cls, rule: GoodRule, metric: str, series: Sequence[Series]) -> Judge:
        """Find the baselines of ``metric`` in ``series``."""
        pool = [s for s in series if s.kind == "fixed"] or list(series)
        best: dict[tuple[str, int], tuple[float, float | None]] = {}
        for s in pool:
            for r in s.records:
                value = r["metrics"].get(metric)
                key = (s.swept, r["trial"]["seed"])
                if value is not None and math.isfinite(value) and value < best.get(key, (math.inf, None))[0]:
                    best[key] = (float(value), _initial(r, metric))
        return cls(rule, metric, best)

    def good(self, s: Series) -> dict[int, set[float]]:
        """``{seed: good step sizes}`` of series ``s``."""
        out: dict[int, set[float]] = {}
        for seed, row in s.by_seed(self.metric).items():
            best, initial = self.baselines.get((s.swept, seed), (math.nan, None))
            out[seed] = {lr for lr, v in row.items() if self.rule.good(v, best, initial)}
        return out

    def everywhere(self, s: Series, lrs: Sequence[float]) -> list[float]:
        """The step sizes of ``lrs`` that ran and are good in every seed."""
        good = self.good(s)
        ran = {r["trial"]["lr"] for r in s.records}
        return [lr for lr in lrs if lr in ran and all(lr in g for g in good.values())]

    def unjudged(self) -> bool:
        """Whether the gap rule lacks an initial value for some baseline (records from before it was kept)."""
        return self.rule.kind == "gap" and any(init is None for _, init in self.baselines.values())


def _other_loss(metric: str) -> str:
    return "test_loss" if metric == "train_loss" else "train_loss"


@dataclass
class _Tables:
    band: list[list[str]]
    grid: list[list[str]]
    held_out: list[list[str]]
    best: list[list[str]]
    failed: list[list[str]]


def _band_row(s: Series, lrs: Sequence[float], judge: Judge, other: Judge) -> list[str]:
    good = judge.good(s)
    everywhere = judge.everywhere(s, lrs)
    walls = [r["wall_seconds"] for r in s.records if r.get("wall_seconds") is not None]
    return [
        s.label,
        s.swept or "—",
        f"{len(everywhere)}/{len(lrs)}",
        " / ".join(str(len(good[seed])) for seed in sorted(good)),
        lr_runs(lrs, everywhere),
        f"{len(other.everywhere(s, lrs))}/{len(lrs)}",
        str(sum(1 for r in s.records if r.get("diverged"))),
        _fmt(statistics.median(walls) if walls else None, 2),
    ]


def _grid_row(s: Series, lrs: Sequence[float], judge: Judge) -> list[str]:
    rows = s.by_seed(judge.metric)
    everywhere = set(judge.everywhere(s, lrs))
    cells = []
    for lr in lrs:
        vals = [row[lr] for row in rows.values() if lr in row]
        med = statistics.median_high([_nan_last(v) for v in vals]) if vals else math.nan
        cells.append(("**" + _fmt(med) + "**") if lr in everywhere else _fmt(med))
    return [s.label, s.swept or "—", *cells]


def _best_row(s: Series, lrs: Sequence[float], metric: str, extra: Sequence[str]) -> list[str]:
    rows = s.by_seed(metric)
    medians = {
        lr: statistics.median_high([_nan_last(row[lr]) for row in rows.values() if lr in row])
        for lr in lrs
        if any(lr in row for row in rows.values())
    }
    lr_star = min(medians, key=lambda k: medians[k])
    at = [r for r in s.records if r["trial"]["lr"] == lr_star]
    others = []
    for m in extra:
        fin = [v for v in (r["metrics"].get(m) for r in at) if v is not None]
        others.append(_fmt(statistics.median(fin)) if fin else "—")
    return [s.label, s.swept or "—", f"{lr_star:.3g}", _fmt(medians[lr_star]), *others]


def _tables(recipe: Any, series: Sequence[Series], failed: Sequence[Record]) -> _Tables:
    metric = recipe.tolerance.metric
    rule = recipe.tolerance.rule()
    lrs = recipe.sweep.lrs()
    judge, other = Judge.of(rule, metric, series), Judge.of(rule, _other_loss(metric), series)
    extra = [m for m in ("train_loss", "test_loss", *recipe.task.metrics) if m != metric]
    head = ["configuration", "options", "good lrs (every seed)", "per seed", "good lrs (runs)"]
    band = [[*head, f"good by {other.metric}", "diverged", "wall s (median)"]]
    grid = [["configuration", "options", *[f"{lr:.3g}" for lr in lrs]]]
    held_out = [list(grid[0])]
    best_rows = [["configuration", "options", "best lr", metric, *extra]]
    for s in series:
        band.append(_band_row(s, lrs, judge, other))
        grid.append(_grid_row(s, lrs, judge))
        held_out.append(_grid_row(s, lrs, other))
        best_rows.append(_best_row(s, lrs, metric, extra))
    fail_rows = [["trial", "configuration", "lr", "seed", "error (last line)"]]
    for r in failed:
        t = r.get("trial", {})
        last = (r.get("error") or "").strip().splitlines()[-1:] or [""]
        fail_rows.append(
            [r["trial_id"], str(t.get("optimizer")), f"{t.get('lr', math.nan):.3g}", str(t.get("seed")), last[0][:200]]
        )
    return _Tables(band, grid, held_out, best_rows, fail_rows)


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


def _intro(recipe: Any, trials: Sequence[Trial], series: Sequence[Series], failed: Sequence[Record]) -> str:
    """The report's first paragraph: progress, the task, the rule with its numbers."""
    tol = recipe.tolerance
    done = sum(len(s.records) for s in series)
    text = (
        f"{done} of {len(trials)} trials finished, {len(failed)} failed. Task: "
        + ", ".join(f"{k}={v}" for k, v in vars(recipe.task).items() if v not in (None, {}, [], ""))
        + ". "
        + tol.rule().describe(tol.metric)
        + f" The same rule on {_other_loss(tol.metric)} (its own best and initial value) is shown beside it."
    )
    if series and Judge.of(tol.rule(), tol.metric, series).unjudged():
        text += (
            f" Some baselines have no initial {tol.metric} recorded (results written before it was kept): "
            "their seeds count nothing as good under the gap rule; run the sweep into a new folder to record it."
        )
    return text


def write_report(folder: str | Path) -> list[Path]:
    """Write ``report.md``, ``report.html`` and the plots into ``folder/report``; returns the paths."""
    folder = Path(folder)
    recipe, trials, series, failed = collect(folder)
    out = folder / REPORT_FOLDER
    out.mkdir(parents=True, exist_ok=True)
    tol = recipe.tolerance
    intro = _intro(recipe, trials, series, failed)
    if not series:
        (out / "report.md").write_text(f"# {recipe.name}\n\n{intro}\n\nNo finished trials yet.\n")
        (out / "report.html").write_text(
            f"<!doctype html><meta charset=utf-8><title>{html.escape(recipe.name)}</title>"
            f"<h1>{html.escape(recipe.name)}</h1><p>{html.escape(intro)}</p>"
            "<p>No finished trials yet.</p>"
        )
        return [out / "report.md", out / "report.html"]
    tables = _tables(recipe, series, failed)
    plots = write_plots(recipe, series, Judge.of(tol.rule(), tol.metric, series), out)
    other = _other_loss(tol.metric)
    bold = f"bold: good for every seed under {tol.rule().formula()}"
    sections: list[tuple[str, str, list[list[str]] | None]] = [
        (f"Band: initial step sizes within tolerance of the best fixed rate ({tol.rule().formula()})", "", tables.band),
        (f"Final {tol.metric} by initial step size (median over seeds; {bold})", "", tables.grid),
        (f"Final {other} by initial step size (median over seeds; {bold} on {other})", "", tables.held_out),
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
