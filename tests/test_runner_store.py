"""The results file: whole records only, a torn last line is dropped, the latest record per trial wins."""

from __future__ import annotations

import json
from pathlib import Path

from stepsize_tower.runner.store import ResultStore


def test_append_read_and_repair(tmp_path: Path) -> None:
    store = ResultStore(tmp_path)
    with store.open() as sink:
        sink.append({"trial_id": "a", "status": "ok", "metrics": {"train_loss": float("nan")}})
        sink.append({"trial_id": "b", "status": "failed", "error": "Traceback ..."})
    with store.path.open("ab") as f:  # a kill in the middle of a write
        f.write(b'{"trial_id": "c", "sta')
    assert [r["trial_id"] for r in store.records()] == ["a", "b"]
    assert store.done_ids() == {"a"}
    with store.open() as sink:  # reopening drops the torn tail
        sink.append({"trial_id": "b", "status": "ok"})
    lines = store.path.read_text().splitlines()
    assert [json.loads(x)["trial_id"] for x in lines] == ["a", "b", "b"]
    assert json.loads(lines[0])["metrics"]["train_loss"] is None  # JSON has no NaN
    assert store.done_ids() == {"a", "b"}
