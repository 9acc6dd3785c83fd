"""A recipe's trial gives exactly what a hand-written loop on the same data and seed gives.

Reference: a plain ``torch.optim`` training loop (zero_grad, loss, backward, step, scheduler
step) written out here over the task's own seeded minibatches; the runner's trial must give
bit-for-bit the same final losses.
"""

from __future__ import annotations

import itertools
from typing import Any

import pytest
import torch

from stepsize_tower import TowerAdam
from stepsize_tower.runner import ResultStore, check_recipe, parse_recipe, run_sweep
from stepsize_tower.tasks import get_task

STEPS = 60
SEED = 3
LR = 0.05

RECIPE = f"""\
name: baseline
task: {{builtin: logreg_cancer, steps: {STEPS}}}
optimizers:
  - {{name: sgd-momentum, kind: fixed, base: SGD, options: {{momentum: 0.9, nesterov: true}}}}
  - {{name: adam-cosine, kind: fixed, base: Adam, options: {{betas: [0.8, 0.99]}}, schedule: {{kind: cosine}}}}
  - {{name: tower-adam, kind: tower, base: adam, depths: [1]}}
sweep: {{lr: [{LR}], seeds: [{SEED}]}}
"""


def _hand_written(name: str) -> tuple[float, float]:
    task = get_task("logreg_cancer").build(SEED)
    params = task.model.parameters()
    sched: Any = None
    opt: torch.optim.Optimizer
    if name == "sgd-momentum":
        opt = torch.optim.SGD(params, lr=LR, momentum=0.9, nesterov=True)
    elif name == "adam-cosine":
        opt = torch.optim.Adam(params, lr=LR, betas=(0.8, 0.99))
        sched = torch.optim.lr_scheduler.CosineAnnealingLR(opt, T_max=STEPS)
    else:
        opt = TowerAdam(params, lr=LR, depth=1)
    for batch in itertools.islice(task.batches(), STEPS):
        opt.zero_grad()
        loss = task.loss_fn(task.model, batch)
        loss.backward()
        opt.step()
        if sched is not None:
            sched.step()
    return task.full_train_loss(task.model), task.test_loss(task.model)


@pytest.fixture(scope="module")
def records(tmp_path_factory: pytest.TempPathFactory) -> dict[str, dict[str, Any]]:
    out = tmp_path_factory.mktemp("baseline")
    loaded = parse_recipe(RECIPE, "baseline.yaml")
    check_recipe(loaded)
    summary = run_sweep(loaded, out, inline=True, stream=open(out / "progress.txt", "w"))
    assert summary.ok == 3
    return {r["trial"]["optimizer"]: r for r in ResultStore(out).records()}


@pytest.mark.parametrize("name", ["sgd-momentum", "adam-cosine", "tower-adam"])
def test_trial_equals_hand_written_loop(records: dict[str, dict[str, Any]], name: str) -> None:
    train_loss, test_loss = _hand_written(name)
    rec = records[name]
    assert rec["status"] == "ok" and rec["steps_done"] == STEPS
    assert rec["metrics"]["train_loss"] == train_loss
    assert rec["metrics"]["test_loss"] == test_loss
    assert rec["initial_loss"] != train_loss  # it trained


@pytest.mark.parametrize("name", ["sgd-momentum", "tower-adam"])
def test_initial_losses_are_the_fresh_models(records: dict[str, dict[str, Any]], name: str) -> None:
    fresh = get_task("logreg_cancer").build(SEED)  # the seed's model before any step
    expected = {"train_loss": fresh.full_train_loss(fresh.model), "test_loss": fresh.test_loss(fresh.model)}
    assert records[name]["initial_metrics"] == expected
    assert records[name]["initial_loss"] == expected["train_loss"]


def test_schedule_is_logged_as_level0(records: dict[str, dict[str, Any]]) -> None:
    traj = records["adam-cosine"]["trajectory"]
    assert traj[0]["step_sizes"] == [[LR]]
    assert traj[-1]["step"] == STEPS and traj[-1]["step_sizes"][0][0] == pytest.approx(0.0, abs=1e-12)
