"""Export the learned level-0 trajectory and replay it on a plain torch.optim optimizer."""

from __future__ import annotations

import json
from collections.abc import Callable

import pytest
import torch
from torch import nn

import stepsize_tower
from stepsize_tower.log_hook import StepSizeLogger
from stepsize_tower.schedule import LearnedSchedule

STEPS = 30


def _model() -> nn.Module:
    torch.manual_seed(0)
    return nn.Sequential(nn.Linear(4, 16), nn.Tanh(), nn.Linear(16, 1)).double()


def _loss(model: nn.Module, step: int) -> torch.Tensor:
    gen = torch.Generator().manual_seed(step)
    x = torch.randn(32, 4, generator=gen, dtype=torch.float64)
    return ((model(x).squeeze(-1) - torch.sin(2 * x[:, 0]) * x[:, 1]) ** 2).mean()


def _run(model: nn.Module, opt: torch.optim.Optimizer, after: Callable[[], object]) -> None:
    for step in range(STEPS):
        opt.zero_grad()
        _loss(model, step).backward()
        opt.step()
        after()


def _record(
    make_opt: Callable[[object], torch.optim.Optimizer],
) -> tuple[nn.Module, torch.optim.Optimizer, LearnedSchedule]:
    model = _model()
    opt = make_opt(model.parameters())
    log = StepSizeLogger(opt)
    _run(model, opt, log)
    return model, opt, log.schedule()


def _replay(schedule: LearnedSchedule, make_ref: Callable[[object], torch.optim.Optimizer]) -> nn.Module:
    model = _model()
    opt = make_ref(model.parameters())
    sched = schedule.scheduler(opt)
    _run(model, opt, sched.step)
    return model


#: Replayed weights against the tower's, float64: measured at most 3.6e-15 relative and 1.7e-16
#: absolute (the retreat case; Adam and plain SGD replay bitwise).
REPLAY_RTOL, REPLAY_ATOL = 1e-13, 1e-15

CASES = {
    # (tower, reference torch.optim optimizer with the same hyperparameters)
    "sgd": (
        lambda ps: stepsize_tower.TowerSGD(ps, lr=0.02, retreat=False),
        lambda ps: torch.optim.SGD(ps, lr=123.0),
    ),
    "sgd_momentum": (
        lambda ps: stepsize_tower.TowerSGD(ps, lr=0.01, momentum=0.9, retreat=False),
        lambda ps: torch.optim.SGD(ps, lr=123.0, momentum=0.9),
    ),
    "adam": (
        lambda ps: stepsize_tower.TowerAdam(ps, lr=1e-3, retreat=False),
        lambda ps: torch.optim.Adam(ps, lr=123.0),
    ),
}


@pytest.mark.parametrize("case", sorted(CASES))
def test_replay_reproduces_the_towers_weights(case: str, tmp_path) -> None:
    """reference: torch.optim.SGD / torch.optim.Adam driven by the exported trajectory, same data and seed."""
    make_tower, make_ref = CASES[case]
    model, _opt, schedule = _record(make_tower)
    assert schedule.all_taken and schedule.steps == STEPS
    assert max(schedule.step_sizes[0]) / min(schedule.step_sizes[0]) > 1.01  # the step size did move
    loaded = LearnedSchedule.load(schedule.save(tmp_path / "schedule.json"))
    assert loaded == schedule  # JSON keeps every float bit
    replayed = _replay(loaded, make_ref)
    for a, b in zip(model.parameters(), replayed.parameters(), strict=True):
        torch.testing.assert_close(a, b, rtol=REPLAY_RTOL, atol=REPLAY_ATOL)


def test_replay_with_retreats_is_exact_for_plain_sgd() -> None:
    """A retreat rewrites the previous entry and adds a zero one. reference: torch.optim.SGD.

    The retreat moves ``w + (a_prev - a_new) d``, the replay ``w_{s-2} - a_new d``: equal up to
    rounding. lr=1 retreats twice and stays bounded; from lr=5 the weights grow to ~300 and the
    rounding grows to ~1e-6 relative over 30 steps.
    """
    model, opt, schedule = _record(lambda ps: stepsize_tower.TowerSGD(ps, lr=1.0))
    assert opt.retreats() > 0 and "retreat" in schedule.status[0]
    assert schedule.step_sizes[0][schedule.status[0].index("retreat")] == 0.0
    replayed = _replay(schedule, lambda ps: torch.optim.SGD(ps, lr=0.0))
    for a, b in zip(model.parameters(), replayed.parameters(), strict=True):
        torch.testing.assert_close(a, b, rtol=REPLAY_RTOL, atol=REPLAY_ATOL)


def test_file_format_and_holding_the_last_value(tmp_path) -> None:
    _, _, schedule = _record(lambda ps: stepsize_tower.TowerSGD(ps, lr=0.02, retreat=False))
    path = schedule.save(tmp_path / "s.json")
    doc = json.loads(path.read_text())
    assert doc["format"] == "stepsize_tower/learned-schedule" and doc["level"] == 0
    assert doc["meta"]["optimizer"] == "TowerSGD" and len(doc["groups"][0]["step_sizes"]) == STEPS
    opt = torch.optim.SGD(nn.Linear(2, 1).parameters(), lr=1.0)
    sched = schedule.scheduler(opt)
    lrs = []
    for _ in range(STEPS + 3):
        lrs.append(opt.param_groups[0]["lr"])
        opt.step()
        sched.step()
    assert lrs[:STEPS] == list(schedule.step_sizes[0])
    assert lrs[STEPS:] == [schedule.step_sizes[0][-1]] * 3
    with pytest.raises(ValueError, match="not a stepsize_tower"):
        LearnedSchedule.from_dict({"format": "other"})
