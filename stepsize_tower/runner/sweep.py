"""Run a whole sweep into a folder, resuming what an earlier run of the same recipe left.

Folder layout::

    DIR/recipe.yaml        the resolved recipe (every default filled in; rewritten on each run)
    DIR/source.yaml        the recipe file as written
    DIR/sweep.json         where the recipe came from, the trial count, the package version
    DIR/results.jsonl      one record per finished trial (append-only)
    DIR/tb/<run name>/     one TensorBoard run per trial
    DIR/report/            written by ``stepsize-tower report DIR``
"""

from __future__ import annotations

import json
import os
import sys
import time
from dataclasses import dataclass
from pathlib import Path
from typing import TextIO

import yaml

from .checks import search_path
from .execute import TrialJob, run_trial
from .pool import Progress, run_pool
from .schema import LoadedRecipe, recipe_to_dict
from .store import ResultStore
from .trials import Trial, expand_trials

__all__ = ["TB_FOLDER", "SweepSummary", "default_out", "jobs_for", "run_sweep", "write_resolved"]

TB_FOLDER = "tb"


@dataclass(frozen=True)
class SweepSummary:
    """What one ``run`` did: trials in the grid, already done before, and finished now."""

    total: int
    skipped: int
    ok: int
    failed: int
    out: Path


def default_out(loaded: LoadedRecipe) -> Path:
    """``runs/<recipe name>`` under the current directory."""
    return Path("runs") / loaded.recipe.name


def write_resolved(loaded: LoadedRecipe, out: Path, trials: list[Trial]) -> None:
    """Save the resolved recipe, the original text and the sweep's provenance in ``out``."""
    from .. import __version__

    out.mkdir(parents=True, exist_ok=True)
    resolved = yaml.safe_dump(recipe_to_dict(loaded.recipe), sort_keys=False)
    _atomic_write(out / "recipe.yaml", resolved)
    if loaded.folder is not None and Path(loaded.source).is_file():
        _atomic_write(out / "source.yaml", Path(loaded.source).read_text())
    info = {
        "source": str(Path(loaded.source).resolve()) if loaded.folder else loaded.source,
        "search_path": search_path(loaded),
        "trials": len(trials),
        "version": __version__,
        "python": sys.version.split()[0],
        "written_at": time.strftime("%Y-%m-%dT%H:%M:%S"),
    }
    _atomic_write(out / "sweep.json", json.dumps(info, indent=2) + "\n")


def _atomic_write(path: Path, text: str) -> None:
    tmp = path.with_name(path.name + ".tmp")
    tmp.write_text(text)
    os.replace(tmp, path)


def jobs_for(loaded: LoadedRecipe, out: Path, trials: list[Trial]) -> list[TrialJob]:
    """One job per trial, logging to ``out/tb/<run name>``."""
    r = loaded.recipe
    paths = search_path(loaded)
    return [
        TrialJob(
            trial=t,
            task=r.task,
            search_path=paths,
            log_dir=str(out / TB_FOLDER / t.run_name),
            log_every=r.resources.log_every,
            threads=r.resources.threads,
            metrics=tuple(r.task.metrics),
        )
        for t in trials
    ]


def run_sweep(
    loaded: LoadedRecipe, out: Path, workers: int | None = None, stream: TextIO | None = None, inline: bool = False
) -> SweepSummary:
    """Run every trial of ``loaded`` not yet done in ``out``; failed ones are retried.

    Args:
        loaded: a checked recipe.
        out: the sweep folder (created).
        workers: worker processes (default: the recipe's, else one per core).
        stream: where progress goes (default: stderr).
        inline: run trials in this process, one after another (for tests and debugging).
    """
    trials = expand_trials(loaded.recipe)
    write_resolved(loaded, out, trials)
    store = ResultStore(out)
    done = store.done_ids()
    todo = [t for t in trials if t.trial_id not in done]
    skipped = len(trials) - len(todo)
    n_workers = workers or loaded.recipe.resources.workers or os.cpu_count() or 1
    n_workers = max(1, min(n_workers, len(todo) or 1))
    stream = stream if stream is not None else sys.stderr
    stream.write(
        f"{loaded.recipe.name}: {len(trials)} trials, {skipped} already done, {len(todo)} to run "
        f"on {1 if inline else n_workers} worker{'s' if n_workers > 1 and not inline else ''} -> {out}\n"
    )
    progress = Progress(len(trials), skipped, stream)
    jobs = jobs_for(loaded, out, todo)
    with store.open() as sink:
        if inline:
            ok = failed = 0
            for job in jobs:
                record = run_trial(job)
                sink.append(record)
                ok, failed = ok + (record["status"] == "ok"), failed + (record["status"] != "ok")
                progress.update(ok, failed, 0)
            progress.update(ok, failed, 0, final=True)
        else:
            ok, failed = run_pool(jobs, n_workers, sink.append, progress)
    return SweepSummary(len(trials), skipped, ok, failed, out)
