"""A trial that raises is recorded as failed with its traceback; the other trials finish; a rerun retries it."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from stepsize_tower.runner.cli import main

USER_MODULE = """
import torch
from torch import nn


def build(seed, rows=256):
    if seed == 1:
        raise RuntimeError("seed 1 is broken on purpose")
    gen = torch.Generator().manual_seed(seed)
    x = torch.randn(rows, 3, generator=gen)
    y = x @ torch.tensor([1.0, -2.0, 0.5]) + 0.1 * torch.randn(rows, generator=gen)
    return {"model": nn.Linear(3, 1), "train": (x, y), "test": (x[:64], y[:64]), "loss": "mse"}
"""

RECIPE = """\
name: flaky
task: {user: flaky_task:build, steps: 20, batch_size: 16, options: {rows: 128}}
optimizers:
  - {name: tower-sgd, kind: tower, base: sgd}
  - {name: sgd, kind: fixed, base: SGD}
sweep: {lr: [0.01, 0.1], seeds: [0, 1]}
"""


def test_failing_trial_is_recorded_and_others_finish(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    (tmp_path / "flaky_task.py").write_text(USER_MODULE)  # found next to the recipe
    recipe = tmp_path / "flaky.yaml"
    recipe.write_text(RECIPE)
    out = tmp_path / "out"
    assert main(["run", str(recipe), "--out", str(out), "--workers", "2"]) == 1
    records = [json.loads(line) for line in (out / "results.jsonl").read_text().splitlines()]
    failed = [r for r in records if r["status"] == "failed"]
    ok = [r for r in records if r["status"] == "ok"]
    assert len(records) == 8 and len(failed) == 4 and len(ok) == 4
    assert {r["trial"]["seed"] for r in failed} == {1}
    for r in failed:
        assert r["error"].startswith("Traceback") and "seed 1 is broken on purpose" in r["error"]
        assert "flaky_task.py" in r["error"]
    assert all(r["metrics"]["train_loss"] is not None for r in ok)
    assert "4 trial(s) failed" in capsys.readouterr().err
    assert "seed 1 is broken on purpose" in (out / "report" / "report.md").read_text()
    # a rerun retries only the failed trials (they fail again) and keeps the finished ones
    assert main(["run", str(recipe), "--out", str(out), "--workers", "2", "--no-report"]) == 1
    again = [json.loads(line) for line in (out / "results.jsonl").read_text().splitlines()]
    assert again[:8] == records and len(again) == 12
    assert {r["trial_id"] for r in again[8:]} == {r["trial_id"] for r in failed}


def test_user_function_returning_wrong_thing(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    (tmp_path / "wrong_task.py").write_text("def build(seed):\n    return 42\n")
    recipe = tmp_path / "wrong.yaml"
    recipe.write_text(RECIPE.replace("flaky_task:build", "wrong_task:build").replace(", options: {rows: 128}", ""))
    assert main(["check", str(recipe)]) == 2
    err = capsys.readouterr().err
    assert "task.user" in err and "returned int" in err and "'model' (nn.Module)" in err
