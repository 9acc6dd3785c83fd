"""The recipe runner's good-result rules and the band table built on them.

Reference: hand computations of each rule's threshold (normalized gap
``L_best + gap × (L_init − L_best)``, ratio band ``max(ratio × L_best, L_best + slack)``) on
numbers chosen so the two rules disagree; and a hand-written sweep folder whose band table
must show exactly the runs of good step sizes computed here.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pytest
import yaml

from stepsize_tower.runner import RecipeError, check_recipe, expand_trials, load_recipe, parse_recipe
from stepsize_tower.runner.cli import main
from stepsize_tower.runner.report import lr_runs, write_report
from stepsize_tower.runner.schema import recipe_to_dict
from stepsize_tower.runner.tolerance import GoodRule

BASE = """\
name: tol
task: {builtin: logreg_cancer, steps: 5}
optimizers:
  - {name: tower-sgd, kind: tower, base: sgd}
  - {name: sgd, kind: fixed, base: SGD}
sweep:
  lr: [1.0e-6, 1.0e-5, 1.0e-4, 1.0e-3, 1.0e-2, 0.1, 1.0]
  seeds: [0, 1]
"""


# ---------------------------------------------------------------------------- rule arithmetic


def test_gap_threshold_is_the_share_of_the_way_from_initial_to_best() -> None:
    rule = GoodRule("gap", gap=0.05)
    # by hand: 0.4 + 0.05 × (2.0 − 0.4) = 0.48
    assert rule.threshold(0.4, 2.0) == pytest.approx(0.48, abs=1e-15)
    assert rule.good(0.4799, 0.4, 2.0) and not rule.good(0.4801, 0.4, 2.0)
    # the ratio band would pass 0.49 (≤ 1.25 × 0.4 = 0.5); the gap does not
    assert GoodRule("ratio", ratio=1.25, slack=0.01).good(0.49, 0.4, 2.0)
    assert not rule.good(0.49, 0.4, 2.0)
    # a baseline that never improved on its start: only L_best itself is good
    assert rule.threshold(0.4, 0.3) == 0.4
    # no initial value: the gap cannot judge; nothing non-finite is ever good
    assert not rule.good(0.1, 0.4, None)
    assert not rule.good(float("nan"), 0.4, 2.0) and not rule.good(None, 0.4, 2.0)


def test_ratio_threshold_is_the_larger_of_ratio_and_slack() -> None:
    rule = GoodRule("ratio", ratio=1.25, slack=0.01)
    assert rule.threshold(0.4, None) == pytest.approx(0.5, abs=1e-15)  # 1.25 × 0.4 > 0.4 + 0.01
    assert rule.threshold(0.02, None) == pytest.approx(0.03, abs=1e-15)  # 0.02 + 0.01 > 1.25 × 0.02


def test_lr_runs_split_at_a_bad_step_size() -> None:
    lrs = [1e-6, 1e-5, 1e-4, 1e-3, 1e-2, 1e-1, 1.0]
    assert lr_runs(lrs, {1e-6, 1e-5, 1e-4, 1e-3, 1e-1}) == "1e-06 … 0.001, 0.1"
    assert lr_runs(lrs, {1e-6, 1e-2, 1.0}) == "1e-06, 0.01, 1"
    assert lr_runs(list(reversed(lrs)), {1e-1, 1.0}) == "0.1 … 1"  # the grid's order, smallest first
    assert lr_runs(lrs, set()) == "—"


# ---------------------------------------------------------------------------- recipe keys


def test_gap_is_the_default_and_survives_the_resolved_recipe() -> None:
    loaded = parse_recipe(BASE, "tol.yaml")
    check_recipe(loaded)
    assert loaded.recipe.tolerance.rule() == GoodRule("gap", gap=0.05)
    resolved = recipe_to_dict(loaded.recipe)["tolerance"]
    assert resolved == {"metric": "train_loss", "gap": 0.05, "ratio": None, "slack": None}
    again = parse_recipe(yaml.safe_dump(recipe_to_dict(loaded.recipe)), "resolved.yaml")
    check_recipe(again)
    assert again.recipe.tolerance.rule() == GoodRule("gap", gap=0.05)


def test_ratio_form_stays_available_with_its_defaults() -> None:
    loaded = parse_recipe(BASE + "tolerance: {metric: test_loss, ratio: 1.5}\n", "tol.yaml")
    check_recipe(loaded)
    assert loaded.recipe.tolerance.rule() == GoodRule("ratio", ratio=1.5, slack=0.01)
    assert recipe_to_dict(loaded.recipe)["tolerance"] == {
        "metric": "test_loss",
        "gap": None,
        "ratio": 1.5,
        "slack": 0.01,
    }


@pytest.mark.parametrize("key", ["ratio", "slack"])
def test_gap_with_a_ratio_key_names_the_key_and_file(
    key: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    recipe = tmp_path / "mixed.yaml"
    recipe.write_text(BASE + f"tolerance:\n  gap: 0.05\n  {key}: 1.25\n")  # the key sits on line 11
    assert main(["check", str(recipe)]) == 2
    err = capsys.readouterr().err
    assert f"{recipe}:11: tolerance.{key}: '{key}' belongs to the ratio band and 'gap'" in err
    assert "give one rule" in err


@pytest.mark.parametrize("gap", ["-0.1", "1.5"])
def test_gap_outside_zero_one_is_an_error(gap: str) -> None:
    with pytest.raises(RecipeError, match=r"tolerance\.gap: expected a gap in \[0, 1\]"):
        check_recipe(parse_recipe(BASE + f"tolerance: {{gap: {gap}}}\n", "x.yaml"))


# ---------------------------------------------------------------------------- report on a hand-made sweep

LRS = [1e-6, 1e-5, 1e-4, 1e-3, 1e-2, 0.1, 1.0]
#: (seed) -> initial train / test loss of that seed's model
INITIAL = {0: (2.0, 2.2), 1: (3.0, 3.3)}
#: (optimizer, seed) -> final train losses by lr (LRS order)
TRAIN = {
    ("sgd", 0): [1.9, 1.9, 1.9, 1.9, 1.9, 0.4, 1.9],
    ("sgd", 1): [2.9, 2.9, 2.9, 2.9, 2.9, 1.0, 2.9],
    ("tower-sgd", 0): [0.45, 0.45, 0.45, 0.45, 0.9, 0.55, 0.6],
    ("tower-sgd", 1): [1.1, 1.1, 1.1, 1.1, 2.5, 1.15, 1.3],
}
TEST = {
    ("sgd", 0): [2.0] * 5 + [0.5, 2.0],
    ("sgd", 1): [3.0] * 5 + [1.1, 3.0],
    ("tower-sgd", 0): [0.6] * 4 + [0.9, 0.6, 0.6],
    ("tower-sgd", 1): [1.3] * 7,
}


def _hand_good(rule: GoodRule, table: dict[tuple[str, int], list[float]], column: int) -> list[float]:
    """Step sizes of tower-sgd good in both seeds, every threshold computed here."""
    good = []
    for i, lr in enumerate(LRS):
        ok = True
        for seed in (0, 1):
            best = min(table[("sgd", seed)])
            init = INITIAL[seed][column]
            limit = best + rule.gap * (init - best) if rule.kind == "gap" else max(rule.ratio * best, best + rule.slack)
            ok = ok and table[("tower-sgd", seed)][i] <= limit
        if ok:
            good.append(lr)
    return good


def _write_sweep(folder: Path, tolerance: str) -> None:
    loaded = parse_recipe(BASE + tolerance, "tol.yaml")
    check_recipe(loaded)
    folder.mkdir()
    (folder / "recipe.yaml").write_text(yaml.safe_dump(recipe_to_dict(loaded.recipe), sort_keys=False))
    lines = []
    for t in expand_trials(load_recipe(folder / "recipe.yaml").recipe):
        i = LRS.index(t.lr)
        record: dict[str, Any] = {
            "trial_id": t.trial_id,
            "status": "ok",
            "trial": t.config(),
            "metrics": {"train_loss": TRAIN[(t.optimizer, t.seed)][i], "test_loss": TEST[(t.optimizer, t.seed)][i]},
            "initial_metrics": {"train_loss": INITIAL[t.seed][0], "test_loss": INITIAL[t.seed][1]},
            "initial_loss": INITIAL[t.seed][0],
            "diverged": False,
            "wall_seconds": 0.5,
            "trajectory": [{"step": 0, "step_sizes": [[t.lr, 0.01]]}, {"step": 5, "step_sizes": [[t.lr, 0.01]]}],
        }
        lines.append(json.dumps(record))
    (folder / "results.jsonl").write_text("\n".join(lines) + "\n")


@pytest.mark.parametrize(
    ("tolerance", "rule", "runs", "words"),
    [
        ("tolerance: {gap: 0.1}\n", GoodRule("gap", gap=0.1), "1e-06 … 0.001, 0.1", "L_best + 0.1 × (L_init − L_best)"),
        (
            "tolerance: {ratio: 1.25, slack: 0.01}\n",
            GoodRule("ratio", ratio=1.25, slack=0.01),
            "1e-06 … 0.001",
            "max(1.25 × L_best, L_best + 0.01)",
        ),
    ],
    ids=["gap", "ratio"],
)
def test_band_table_follows_the_rule_and_prints_runs_of_good_lrs(
    tolerance: str, rule: GoodRule, runs: str, words: str, tmp_path: Path
) -> None:
    folder = tmp_path / "sweep"
    _write_sweep(folder, tolerance)
    write_report(folder)
    md = (folder / "report" / "report.md").read_text()
    good = _hand_good(rule, TRAIN, 0)
    held_out = _hand_good(rule, TEST, 1)
    assert runs == lr_runs(LRS, good)  # the hand computation gives the runs the case names
    row = next(line for line in md.splitlines() if line.startswith("| tower-sgd d1 | — |"))
    cells = [c.strip() for c in row.strip("|").split("|")]
    assert cells[2] == f"{len(good)}/7"
    assert cells[4] == runs
    assert cells[5] == f"{len(held_out)}/7"  # the same rule on the held-out loss
    assert words in md and ("normalized gap" in md) == (rule.kind == "gap")
    assert "Final test_loss by initial step size" in md
