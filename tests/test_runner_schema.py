"""Malformed recipes: each kind gives a clear error (file, line, key, what was expected) and exit 2, writing nothing."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

from stepsize_tower.runner import RecipeError, check_recipe, expand_trials, parse_recipe
from stepsize_tower.runner.cli import main

GOOD = """\
name: tiny
task:
  builtin: logreg_cancer
  steps: 5
optimizers:
  - {name: tower-sgd, kind: tower, base: sgd}
  - {name: sgd, kind: fixed, base: SGD}
sweep:
  lr: [0.01, 0.1]
  seeds: [0]
"""

# (kind, recipe text or None to edit GOOD, extra --set, words the message must contain)
CASES: list[tuple[str, str, list[str], list[str]]] = [
    ("bad yaml", GOOD.replace("seeds: [0]", "seeds: [0"), [], ["not valid YAML", ":11"]),
    ("unknown top-level key", GOOD.replace("sweep:", "sweeep:"), [], ["sweeep", "did you mean 'sweep'", ":8"]),
    ("unknown nested key", GOOD.replace("steps: 5", "stepz: 5"), [], ["task.stepz", "did you mean 'steps'", ":4"]),
    ("wrong type", GOOD.replace("steps: 5", "steps: many"), [], ["task.steps", "expected an integer", ":4"]),
    ("negative step size", GOOD.replace("[0.01, 0.1]", "[0.01, -0.1]"), [], ["sweep.lr[1]", "positive", ":9"]),
    ("empty grid", GOOD.replace("seeds: [0]", "seeds: []"), [], ["sweep.seeds", "empty"]),
    ("unknown built-in task", GOOD.replace("logreg_cancer", "logreg_cancr"), [], ["logreg_cancer", "task.builtin"]),
    (
        "unknown dataset",
        GOOD.replace("builtin: logreg_cancer", "dataset: winee\n  model: mlp"),
        [],
        ["unknown dataset 'winee'", "did you mean 'wine'"],
    ),
    (
        "unknown model",
        GOOD.replace("builtin: logreg_cancer", "dataset: wine\n  model: transformer"),
        [],
        ["unknown model 'transformer'", "linear"],
    ),
    ("bad import path", GOOD.replace("builtin: logreg_cancer", "user: no_such_pkg.mod:build"), [], ["no_such_pkg"]),
    ("malformed import path", GOOD.replace("builtin: logreg_cancer", "user: 'os.system(1)'"), [], ["module:function"]),
    ("unknown torch optimizer", GOOD.replace("base: SGD", "base: SDG"), [], ["'SDG' is not a torch.optim optimizer"]),
    ("unknown optimizer option", GOOD.replace("base: SGD}", "base: SGD, options: {momentom: 0.9}}"), [], ["momentom"]),
    ("missing required key", "name: x\ntask: {builtin: lsq_raw}\n", [], ["missing required key 'optimizers'"]),
    ("duplicate key", GOOD + "name: again\n", [], ["duplicate key 'name'", ":11"]),
    ("empty file", "", [], ["empty"]),
    ("top level not a mapping", "- 1\n- 2\n", [], ["expected a mapping"]),
    ("unknown metric", GOOD.replace("steps: 5", "steps: 5\n  metrics: [test_acc]"), [], ["unknown metric 'test_acc'"]),
    ("steps and epochs", GOOD.replace("steps: 5", "steps: 5\n  epochs: 2"), [], ["not both"]),
    ("cnn on tabular data", GOOD.replace("builtin: logreg_cancer", "dataset: wine\n  model: cnn"), [], ["image"]),
    ("--set wrong type", GOOD, ["task.steps=abc"], ["task.steps", "expected an integer"]),
    ("--set unknown key", GOOD, ["sweep.seed=[1]"], ["sweep.seed", "did you mean 'seeds'"]),
    ("--set not key=value", GOOD, ["task.steps"], ["expected key=value"]),
]


@pytest.mark.parametrize(("kind", "text", "overrides", "words"), CASES, ids=[c[0] for c in CASES])
def test_malformed_recipe_exits_2_and_writes_nothing(
    kind: str, text: str, overrides: list[str], words: list[str], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    recipe = tmp_path / "recipe.yaml"
    recipe.write_text(text)
    out = tmp_path / "out"
    args = ["run", str(recipe), "--out", str(out), "--workers", "1"]
    for item in overrides:
        args += ["--set", item]
    assert main(args) == 2
    err = capsys.readouterr().err
    assert err.startswith("error: ")
    for word in words:
        assert word in err, f"{kind}: {word!r} missing from {err!r}"
    assert not out.exists(), "a malformed recipe must not write anything"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["recipe.yaml"]


def test_error_names_the_file(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    recipe = tmp_path / "named.yaml"
    recipe.write_text(GOOD.replace("steps: 5", "steps: -3"))
    assert main(["check", str(recipe)]) == 2
    err = capsys.readouterr().err
    assert f"{recipe}:4: task.steps: expected an integer >= 1, got -3" in err


def test_entry_point_exit_status(tmp_path: Path) -> None:
    recipe = tmp_path / "bad.yaml"
    recipe.write_text(GOOD.replace("kind: fixed", "kind: constant"))
    exe = Path(sys.executable).with_name("stepsize-tower")
    proc = subprocess.run([str(exe), "check", str(recipe)], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2
    assert "optimizers[1].kind" in proc.stderr and "'fixed'" in proc.stderr


def test_good_recipe_defaults_and_overrides() -> None:
    loaded = parse_recipe(GOOD, "good.yaml", ["sweep.seeds=[0, 1]", "optimizers.0.depths=[1, 2]", "sweep.lr=[1e-3]"])
    check_recipe(loaded)
    r = loaded.recipe
    assert r.sweep.seeds == [0, 1]
    assert r.sweep.lrs() == [1e-3]  # "1e-3" is a string in YAML 1.1: accepted for a number field
    assert r.tolerance.rule().kind == "gap" and r.tolerance.rule().gap == 0.05 and r.resources.threads == 1
    trials = expand_trials(r)
    assert len(trials) == (2 + 1) * 1 * 2
    assert len({t.trial_id for t in trials}) == len(trials)
    # ids are stable: the same recipe gives the same ids; another task setting gives new ones
    again = expand_trials(
        parse_recipe(GOOD, "x", ["sweep.seeds=[0, 1]", "optimizers.0.depths=[1, 2]", "sweep.lr=[1e-3]"]).recipe
    )
    assert [t.trial_id for t in again] == [t.trial_id for t in trials]
    other = expand_trials(parse_recipe(GOOD.replace("steps: 5", "steps: 6"), "x").recipe)
    assert not {t.trial_id for t in other} & {t.trial_id for t in trials}


def test_log_range() -> None:
    r = parse_recipe(GOOD.replace("[0.01, 0.1]", "{low: 1.0e-5, high: 1.0, points: 6}"), "x").recipe
    assert r.sweep.lrs() == [1e-5, 1e-4, 1e-3, 1e-2, 1e-1, 1.0]


def test_recipe_error_is_raised_for_python_callers() -> None:
    with pytest.raises(RecipeError, match=r"sweep\.lr\[0\]"):
        check_recipe(parse_recipe(GOOD.replace("[0.01, 0.1]", "[0.0]"), "x"))


def test_bundled_recipes_check() -> None:
    for name in ("quickstart", "user_model", "mlp_wine"):
        assert main(["check", name]) == 0
