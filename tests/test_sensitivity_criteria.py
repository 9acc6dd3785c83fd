"""The sensitivity benchmark's criteria (experiments/sensitivity_report.py) on hand-made points.

Reference: thresholds computed here by hand, normalized gap
``L_best + 0.05 × (L_init − L_best)`` and ratio band ``max(1.25 × L_best, L_best + 0.01)``,
on numbers where the two disagree; and the held-out loss of a freshly built task.
"""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Any

import pytest

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "experiments"))
import sensitivity_report as sr

from stepsize_tower.tasks import get_task

LRS = [1e-3, 1e-2, 1e-1, 1.0]


def _point(method: str, lr: float, seed: int, train: float | None, test: float | None, init: float) -> dict[str, Any]:
    return {
        "task": "logreg_cancer",
        "base": "sgd",
        "method": method,
        "lr": lr,
        "seed": seed,
        "final_loss": train,
        "test_loss": test,
        "initial_loss": init,
        "initial_test_loss": init + 0.1,
        "diverged": train is None,
        "step_sizes": [[lr]],
        "retreats": 0,
        "wall_seconds": 1.0,
    }


# seed 0: L_init 0.7, fixed best 0.10 at lr 0.1 → gap limit 0.10 + 0.05 × 0.60 = 0.13, ratio limit 0.125
# held-out: L_init 0.8, fixed best 0.2 → gap limit 0.2 + 0.05 × 0.6 = 0.23 (0.225 with the train L_init)
FIXED = [(0.5, 0.6), (0.3, 0.4), (0.10, 0.2), (None, None)]
TOWER = [(0.128, 0.25), (0.12, 0.22), (0.09, 0.19), (0.14, 0.228)]
RECORDS = [_point("fixed", lr, 0, tr, te, 0.7) for lr, (tr, te) in zip(LRS, FIXED, strict=True)] + [
    _point("tower", lr, 0, tr, te, 0.7) for lr, (tr, te) in zip(LRS, TOWER, strict=True)
]


def _by_hand(values: list[tuple[float | None, float | None]], column: int, limit: float) -> set[float]:
    return {lr for lr, v in zip(LRS, values, strict=True) if v[column] is not None and v[column] <= limit}


def test_gap_ratio_and_held_out_counts_follow_the_hand_thresholds() -> None:
    judged = sr.Judged.of(RECORDS)
    gap = judged.cell(sr.PRIMARY, "logreg_cancer", "sgd", "tower")
    ratio = judged.cell(sr.OLD, "logreg_cancer", "sgd", "tower")
    held = judged.cell(sr.HELD_OUT, "logreg_cancer", "sgd", "tower")
    assert gap is not None and ratio is not None and held is not None
    good = lambda cell: {lr for lr, ok in cell.good[0].items() if ok}  # noqa: E731
    assert good(gap) == _by_hand(TOWER, 0, 0.10 + 0.05 * (0.7 - 0.10)) == {1e-3, 1e-2, 1e-1}
    assert good(ratio) == _by_hand(TOWER, 0, max(1.25 * 0.10, 0.10 + 0.01)) == {1e-2, 1e-1}
    assert good(held) == _by_hand(TOWER, 1, 0.2 + 0.05 * (0.8 - 0.2)) == {1e-2, 1e-1, 1.0}
    ratio_only, gap_only = sr.disagreements(judged, "tower")
    assert ratio_only == [] and gap_only == [("logreg_cancer", "sgd", 0, 1e-3)]
    assert sr.totals(judged, sr.PRIMARY)[("tower", "sgd")] == (3, 4)
    assert sr.totals(judged, sr.OLD)[("tower", "sgd")] == (2, 4)


def test_report_names_both_criteria_with_their_counts() -> None:
    text = sr.report(RECORDS, {})
    assert "L ≤ L_best + 0.05 × (L_init − L_best)" in text and "L ≤ max(1.25 × L_best, L_best + 0.01)" in text
    assert "| logreg_cancer | sgd | tower | 3/4 | 2/4 | 3/4 |" in text


def test_missing_initial_held_out_loss_comes_from_the_fresh_task() -> None:
    records = [dict(r, initial_test_loss=None) for r in RECORDS[:2]]
    assert sr.fill_initial_test_loss(records) == 2
    fresh = get_task("logreg_cancer").build(0)
    assert [r["initial_test_loss"] for r in records] == [fresh.test_loss(fresh.model)] * 2


@pytest.mark.parametrize("lr", LRS)
def test_lr_labels(lr: float) -> None:
    assert float(sr.lr_label(lr)) == lr
