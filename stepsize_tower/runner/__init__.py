"""The recipe runner: YAML sensitivity sweeps of step-size towers against fixed-rate baselines.

Command line: ``stepsize-tower run|check|report|dashboard|list`` (see :mod:`.cli`). From
Python::

    from stepsize_tower.runner import check_recipe, load_recipe, run_sweep, write_report
    loaded = load_recipe("recipes/quickstart.yaml")
    check_recipe(loaded)
    run_sweep(loaded, Path("runs/quickstart"))   # executor=...: where trials run (see .executors)
    write_report("runs/quickstart")
"""

from __future__ import annotations

from .checks import check_recipe
from .errors import RecipeError
from .execute import TrialJob, run_trial
from .executors import Executor, executor_for
from .report import write_report
from .schema import LoadedRecipe, Recipe, load_recipe, parse_recipe
from .store import ResultStore
from .sweep import run_sweep
from .trials import Trial, expand_trials

__all__ = [
    "Executor",
    "LoadedRecipe",
    "Recipe",
    "RecipeError",
    "ResultStore",
    "Trial",
    "TrialJob",
    "check_recipe",
    "executor_for",
    "expand_trials",
    "load_recipe",
    "parse_recipe",
    "run_sweep",
    "run_trial",
    "write_report",
]
