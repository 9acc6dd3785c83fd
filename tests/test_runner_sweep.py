"""End to end: a tiny sweep on 2 workers, killed with SIGKILL mid-way, resumed without re-running
finished trials; then its report files and TensorBoard event files (read back with EventAccumulator)."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from collections import Counter
from pathlib import Path
from typing import Any

import pytest

from stepsize_tower.runner import ResultStore, expand_trials, load_recipe
from stepsize_tower.runner.cli import main
from stepsize_tower.tasks import get_task

RECIPE = """\
name: tiny_sweep
task:
  builtin: logreg_cancer
  steps: 300
optimizers:
  - {name: tower-sgd, kind: tower, base: sgd, depths: [1, 2]}
  - {name: sgd, kind: fixed, base: SGD}
sweep:
  lr: [0.001, 0.1, 10.0]
  seeds: [0, 1]
resources:
  log_every: 20
"""
TOTAL = (2 + 1) * 3 * 2


def _cli() -> list[str]:
    return [str(Path(sys.executable).with_name("stepsize-tower"))]


def _lines(path: Path) -> list[dict[str, Any]]:
    return [json.loads(line) for line in path.read_text().splitlines()] if path.exists() else []


@pytest.fixture(scope="module")
def sweep(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """Run the sweep, SIGKILL it (parent and workers) after a few records, then resume it."""
    root = tmp_path_factory.mktemp("sweep")
    recipe = root / "tiny.yaml"
    recipe.write_text(RECIPE)
    out = root / "out"
    results = out / "results.jsonl"
    cmd = [*_cli(), "run", str(recipe), "--out", str(out), "--workers", "2", "--no-report"]
    proc = subprocess.Popen(cmd, start_new_session=True, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    deadline = time.monotonic() + 120
    while len(_lines(results)) < 3 and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.02)
    os.killpg(proc.pid, signal.SIGKILL)  # the runner and its workers, at once
    proc.wait()
    before = _lines(results)
    second = subprocess.run(cmd[:-1], capture_output=True, text=True, timeout=300)
    return {"out": out, "before": before, "after": _lines(results), "second": second}


def test_kill_and_resume(sweep: dict[str, Any]) -> None:
    before, after = sweep["before"], sweep["after"]
    assert sweep["second"].returncode == 0, sweep["second"].stderr
    assert 3 <= len(before) < TOTAL, "the sweep must be killed mid-way"
    assert f"{len(before)} already done" in sweep["second"].stderr
    # nothing finished was lost or re-run: the first records are still there, unchanged, once each
    assert after[: len(before)] == before
    counts = Counter(r["trial_id"] for r in after)
    assert len(counts) == TOTAL and set(counts.values()) == {1}
    assert all(r["status"] == "ok" for r in after)
    # every record carries the resolved trial config; the resolved recipe sits beside the results
    loaded = load_recipe(sweep["out"] / "recipe.yaml")
    assert {t.trial_id for t in expand_trials(loaded.recipe)} == set(counts)
    assert loaded.recipe.sweep.lr == [0.001, 0.1, 10.0]
    # a third run has nothing to do
    third = subprocess.run(
        [*_cli(), "run", str(sweep["out"] / "recipe.yaml"), "--out", str(sweep["out"])],
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert third.returncode == 0 and f"{TOTAL} already done, 0 to run" in third.stderr
    assert len(_lines(sweep["out"] / "results.jsonl")) == TOTAL


def test_report_files(sweep: dict[str, Any]) -> None:
    out = sweep["out"]
    assert main(["report", str(out)]) == 0
    report = out / "report"
    for name in ("report.md", "report.html", "final_vs_lr.png", "step_sizes.png", "wall_time.png"):
        assert (report / name).stat().st_size > 0, name
    md = (report / "report.md").read_text()
    assert "| tower-sgd d1 |" in md and "| tower-sgd d2 |" in md and "| sgd |" in md
    assert "Band" in md and "good lrs" in md
    page = (report / "report.html").read_text()
    assert page.count("data:image/png;base64,") == 3  # self-contained
    # the band counts follow the default rule (normalized gap 0.05) on the stored results, with
    # L_init the seed's fresh model's training loss, evaluated here
    rows = [r for r in ResultStore(out).records() if r["trial"]["optimizer"] == "sgd"]
    best = {
        s: min(r["metrics"]["train_loss"] for r in rows if r["trial"]["seed"] == s and r["metrics"]["train_loss"])
        for s in (0, 1)
    }
    fresh = {s: get_task("logreg_cancer").build(s) for s in (0, 1)}
    limit = {s: best[s] + 0.05 * (fresh[s].full_train_loss(fresh[s].model) - best[s]) for s in (0, 1)}
    good = {
        lr
        for lr in (0.001, 0.1, 10.0)
        if all(
            (v := next(r for r in rows if r["trial"]["lr"] == lr and r["trial"]["seed"] == s)["metrics"]["train_loss"])
            is not None
            and v <= limit[s]
            for s in (0, 1)
        )
    }
    assert f"| sgd | — | {len(good)}/3 |" in md
    assert "L ≤ L_best + 0.05 × (L_init − L_best)" in md


def test_event_files(sweep: dict[str, Any]) -> None:
    from tensorboard.backend.event_processing.event_accumulator import EventAccumulator
    from tensorboard.plugins.custom_scalar.layout_pb2 import Layout

    records = list(ResultStore(sweep["out"]).records())
    tower = next(r for r in records if r["trial"]["depth"] == 2 and r["trial"]["lr"] == 0.1)
    fixed = next(r for r in records if r["trial"]["kind"] == "fixed")
    acc = EventAccumulator(tower["log_dir"], size_guidance={"scalars": 0, "tensors": 0})
    acc.Reload()
    tags = set(acc.Tags()["scalars"])
    assert {
        "stepsize/level0",
        "stepsize/level1",
        "stepsize/level2",
        "loss/train",
        "loss/test",
        "loss/train_batch",
    } <= tags
    for k in range(3):
        events = acc.Scalars(f"stepsize/level{k}")
        assert [e.step for e in events] == [p["step"] for p in tower["trajectory"]] == list(range(0, 301, 20))
        for e, p in zip(events, tower["trajectory"], strict=True):
            assert e.value == pytest.approx(p["step_sizes"][0][k], rel=1e-6)
    assert acc.Scalars("stepsize/level0")[0].value == pytest.approx(0.1, rel=1e-6)
    assert acc.Scalars("loss/train")[-1].value == pytest.approx(tower["metrics"]["train_loss"], rel=1e-6)
    assert acc.Scalars("loss/test")[-1].value == pytest.approx(tower["metrics"]["test_loss"], rel=1e-6)
    assert acc.Scalars("hparam/train_loss")[0].value == pytest.approx(tower["metrics"]["train_loss"], rel=1e-6)
    assert "_hparams_/session_start_info" in acc.PluginTagToContent("hparams")
    layout = Layout.FromString(acc.Tensors("custom_scalars__config__")[0].tensor_proto.string_val[0])
    charts = [chart for category in layout.category for chart in category.chart]
    assert any(c.multiline.tag == [r"^stepsize/level\d+$"] for c in charts)  # every level on one chart
    # the fixed-rate baseline logs its constant lr as level 0
    facc = EventAccumulator(fixed["log_dir"], size_guidance={"scalars": 0})
    facc.Reload()
    values = [e.value for e in facc.Scalars("stepsize/level0")]
    assert len(values) == 16 and values == pytest.approx([fixed["trial"]["lr"]] * 16, rel=1e-6)
    assert "stepsize/level1" not in facc.Tags()["scalars"]
    # one run folder per trial
    assert len(list((sweep["out"] / "tb").iterdir())) == TOTAL


def test_dashboard_prints_command(sweep: dict[str, Any], capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["dashboard", str(sweep["out"]), "--print-only", "--port", "6123"]) == 0
    text = capsys.readouterr().out
    assert "tensorboard" in text and str(sweep["out"] / "tb") in text and "6123" in text
