"""The logging hook writes every level's step size, from any loop, to a callable or a SummaryWriter."""

from __future__ import annotations

import pytest
import torch
from torch import nn

import stepsize_tower
from stepsize_tower.log_hook import StepSizeLogger
from stepsize_tower.tower import EFFECTIVE_LR_KEY


def _loop(opt: torch.optim.Optimizer, model: nn.Module, log: StepSizeLogger, steps: int, sched=None) -> None:
    for step in range(steps):
        gen = torch.Generator().manual_seed(step)
        x = torch.randn(16, 3, generator=gen)
        opt.zero_grad()
        ((model(x) - x.sum(dim=1, keepdim=True)) ** 2).mean().backward()
        opt.step()
        if sched is not None:
            sched.step()
        log()


def test_callable_sink_gets_every_level_of_every_group() -> None:
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(3, 4), nn.Linear(4, 1))
    opt = stepsize_tower.TowerAdam(
        [{"params": model[0].parameters()}, {"params": model[1].parameters(), "lr": 1e-2, "depth": 2}], lr=1e-3
    )
    seen: list[tuple[str, float, int]] = []
    log = StepSizeLogger(opt, lambda tag, value, step: seen.append((tag, value, step)))
    _loop(opt, model, log, 5)
    last = {tag: value for tag, value, step in seen if step == 5}
    sizes = opt.step_sizes()
    assert set(last) == {f"stepsize/level{k}/group{g}" for g in (0, 1) for k in range(len(sizes[g]))}
    for g, group in enumerate(opt.param_groups):
        assert last[f"stepsize/level0/group{g}"] == float(group[EFFECTIVE_LR_KEY]) == pytest.approx(sizes[g][0])
        for k in range(1, len(sizes[g])):
            assert last[f"stepsize/level{k}/group{g}"] == sizes[g][k]
    assert [r.status for r in log.history] == [["taken", "taken"]] * 5


def test_plain_optimizer_logs_the_lr_each_step_used() -> None:
    """reference: torch.optim.SGD with StepLR; the lr a step used is get_last_lr() before it."""
    model = nn.Linear(3, 1)
    opt = torch.optim.SGD(model.parameters(), lr=0.1)
    sched = torch.optim.lr_scheduler.StepLR(opt, step_size=1, gamma=0.5)
    log = StepSizeLogger(opt)
    _loop(opt, model, log, 4, sched)
    assert [r.step_sizes[0][0] for r in log.history] == pytest.approx([0.1, 0.05, 0.025, 0.0125])


def test_skipped_step_is_reported() -> None:
    model = nn.Linear(3, 1)
    opt = stepsize_tower.TowerSGD(model.parameters(), lr=0.01)
    log = StepSizeLogger(opt)
    _loop(opt, model, log, 2)
    model.weight.grad = torch.full_like(model.weight, float("nan"))
    model.bias.grad = torch.zeros_like(model.bias)
    opt.step()
    log()
    assert log.history[-1].status == ["skipped"]
    assert log.schedule().step_sizes[0][-1] == 0.0


def test_summary_writer_event_files_read_back(tmp_path) -> None:
    tb = pytest.importorskip("torch.utils.tensorboard")
    from tensorboard.backend.event_processing.event_accumulator import EventAccumulator

    torch.manual_seed(0)
    model = nn.Linear(3, 1)
    opt = stepsize_tower.TowerAdam(model.parameters(), lr=1e-3)
    writer = tb.SummaryWriter(str(tmp_path))
    log = StepSizeLogger(opt, writer)
    _loop(opt, model, log, 6)
    writer.close()
    acc = EventAccumulator(str(tmp_path), size_guidance={"scalars": 0})
    acc.Reload()
    events = acc.Scalars("stepsize/level0/group0")
    assert [e.step for e in events] == [1, 2, 3, 4, 5, 6]
    assert [e.value for e in events] == pytest.approx([r.step_sizes[0][0] for r in log.history], rel=1e-6)
    assert "stepsize/level1/group0" in acc.Tags()["scalars"]


def test_on_step_hook_of_the_shared_training_loop() -> None:
    pytest.importorskip("sklearn")
    from stepsize_tower.tasks import get_task, train

    task = get_task("mlp_digits").build(0)
    opt = stepsize_tower.TowerAdam(task.model.parameters(), lr=1e-3)
    seen: dict[str, list[float]] = {}
    log = StepSizeLogger(opt, lambda tag, value, step: seen.setdefault(tag, []).append(value))
    train(task, opt, 5, on_step=log.on_step)
    assert len(seen["loss/train"]) == 5 and len(seen["stepsize/level0/group0"]) == 5
