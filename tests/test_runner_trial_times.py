"""A trial's wall time starts after its own set-up: a worker's first-trial imports and task build are not in it.

No timed assertion: the runner's clock is replaced by a counter that only the (wrapped)
task build advances, by 100 "seconds", the way a first trial's imports and data loading
would. Reference: that counter, by construction (common practice for testing timing code).
"""

from __future__ import annotations

from typing import Any

import pytest

from stepsize_tower.runner import check_recipe, execute, expand_trials, parse_recipe
from stepsize_tower.runner.execute import TrialJob, run_trial

RECIPE = """\
name: times
task: {builtin: logreg_cancer, steps: 3}
optimizers:
  - {name: sgd, kind: fixed, base: SGD}
sweep: {lr: [0.1], seeds: [0]}
"""
STARTUP = 100.0


class _Counter:
    """A clock that stands still except when :meth:`advance` is called."""

    def __init__(self) -> None:
        self.now = 1000.0

    def __call__(self) -> float:
        return self.now

    def advance(self, seconds: float) -> None:
        self.now += seconds


@pytest.fixture
def job() -> TrialJob:
    loaded = parse_recipe(RECIPE, "times.yaml")
    check_recipe(loaded)
    return TrialJob(trial=expand_trials(loaded.recipe)[0], task=loaded.recipe.task)


def test_wall_time_excludes_the_trials_start_up(job: TrialJob, monkeypatch: pytest.MonkeyPatch) -> None:
    clock = _Counter()
    real_build = execute.build_task

    def slow_build(*args: Any, **kwargs: Any) -> Any:
        clock.advance(STARTUP)  # what a first trial's imports and data loading cost
        return real_build(*args, **kwargs)

    monkeypatch.setattr(execute, "_clock", clock)
    monkeypatch.setattr(execute, "build_task", slow_build)
    record = run_trial(job)
    assert record["status"] == "ok", record["error"]
    assert record["setup_seconds"] == STARTUP
    assert record["wall_seconds"] == 0.0


def test_training_counts_in_wall_time(job: TrialJob, monkeypatch: pytest.MonkeyPatch) -> None:
    clock = _Counter()
    real_train = execute.train

    def slow_train(*args: Any, **kwargs: Any) -> Any:
        clock.advance(7.0)
        return real_train(*args, **kwargs)

    monkeypatch.setattr(execute, "_clock", clock)
    monkeypatch.setattr(execute, "train", slow_train)
    record = run_trial(job)
    assert record["status"] == "ok", record["error"]
    assert (record["setup_seconds"], record["wall_seconds"]) == (0.0, 7.0)


def test_failure_during_set_up_counts_the_whole_time(job: TrialJob, monkeypatch: pytest.MonkeyPatch) -> None:
    clock = _Counter()

    def broken_build(*args: Any, **kwargs: Any) -> Any:
        clock.advance(3.0)
        raise ValueError("no data")

    monkeypatch.setattr(execute, "_clock", clock)
    monkeypatch.setattr(execute, "build_task", broken_build)
    record = run_trial(job)
    assert record["status"] == "failed" and "no data" in record["error"]
    assert record["setup_seconds"] is None and record["wall_seconds"] == 3.0
