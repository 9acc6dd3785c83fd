"""Every script under experiments/examples runs to completion with a short step budget."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

EXAMPLES = Path(__file__).resolve().parent.parent / "experiments" / "examples"
SCRIPTS = sorted(p.name for p in EXAMPLES.glob("*.py") if not p.name.startswith("_"))


def test_every_example_is_listed() -> None:
    assert len(SCRIPTS) == 9


@pytest.mark.parametrize("script", SCRIPTS)
def test_example_runs(script: str, tmp_path: Path) -> None:
    args = [sys.executable, str(EXAMPLES / script), "--steps", "12"]
    if script == "logging_hook.py":
        args += ["--logdir", str(tmp_path / "tb")]
    if script == "export_schedule.py":
        args += ["--out", str(tmp_path / "schedule.json")]
    done = subprocess.run(args, capture_output=True, text=True, timeout=120, cwd=tmp_path)
    assert done.returncode == 0, done.stdout[-2000:] + done.stderr[-4000:]
    assert done.stdout.strip(), "an example prints what it did"
