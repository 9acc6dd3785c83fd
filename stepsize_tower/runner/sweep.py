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
from contextlib import ExitStack
from dataclasses import dataclass
from pathlib import Path
from typing import TextIO

import yaml

from .checks import search_path
from .execute import TrialJob
from .executors import Executor, ExecutorError, executor_for
from .pool import Progress
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
    loaded: LoadedRecipe,
    out: Path,
    workers: int | None = None,
    stream: TextIO | None = None,
    inline: bool = False,
    executor: Executor | None = None,
) -> SweepSummary:
    """Run every trial of ``loaded`` not yet done in ``out``; failed ones are retried.

    Args:
        loaded: a checked recipe.
        out: the sweep folder (created).
        workers: local worker processes (default: the recipe's, else one per core); on
            Dask, the most trials in flight at once.
        stream: where progress goes (default: stderr).
        inline: run trials in this process, one after another (for tests and debugging).
        executor: where the trials run (default: the recipe's ``resources.executor``, see
            :mod:`stepsize_tower.runner.executors`).

    Raises:
        RecipeError: the executor cannot start (an extra is missing, the scheduler cannot be
            reached); nothing is written then.
    """
    trials = expand_trials(loaded.recipe)
    store = ResultStore(out)
    done = store.done_ids()
    todo = [t for t in trials if t.trial_id not in done]
    skipped = len(trials) - len(todo)
    runner = executor if executor is not None else executor_for(loaded, len(todo), workers, inline)
    stream = stream if stream is not None else sys.stderr
    with ExitStack() as stack:
        if todo:  # a finished sweep needs no workers, nor a reachable cluster
            try:
                stack.enter_context(runner)
            except ExecutorError as exc:
                raise loaded.error(("resources", exc.key), str(exc)) from None
        write_resolved(loaded, out, trials)
        stream.write(
            f"{loaded.recipe.name}: {len(trials)} trials, {skipped} already done, {len(todo)} to run "
            f"on {runner.describe()} -> {out}\n"
        )
        for note in runner.notes():
            stream.write(f"note: {note}\n")
        progress = Progress(len(trials), skipped, stream)
        jobs = jobs_for(loaded, out, todo)
        with store.open() as sink:
            if jobs:
                ok, failed = runner.run(jobs, sink.append, progress)
            else:
                ok = failed = 0
                progress.update(0, 0, 0, final=True)
    return SweepSummary(len(trials), skipped, ok, failed, out)
