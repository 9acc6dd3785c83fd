"""Schedulers compose with a tower: ``group["lr"]`` is the scheduler's outer factor on the learned step size."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import pytest
import torch
from torch import nn
from torch.optim import lr_scheduler

import stepsize_tower
from stepsize_tower.tower import EFFECTIVE_LR_KEY

STEPS = 12


def _model(seed: int = 0) -> nn.Module:
    torch.manual_seed(seed)
    return nn.Sequential(nn.Linear(4, 8), nn.Tanh(), nn.Linear(8, 1)).double()


def _loss(model: nn.Module, step: int) -> torch.Tensor:
    gen = torch.Generator().manual_seed(100 + step)
    x = torch.randn(16, 4, generator=gen, dtype=torch.float64)
    return ((model(x).squeeze(-1) - torch.sin(x.sum(dim=1))) ** 2).mean()


SCHEDULERS: dict[str, Callable[[Any], Any]] = {
    "warmup": lambda opt: lr_scheduler.LinearLR(opt, start_factor=0.1, total_iters=5),
    "cosine": lambda opt: lr_scheduler.CosineAnnealingLR(opt, T_max=STEPS),
    # cycle_momentum=False: by default OneCycleLR also cycles group["momentum"] (checked separately below)
    "onecycle": lambda opt: lr_scheduler.OneCycleLR(opt, max_lr=0.05, total_steps=STEPS, cycle_momentum=False),
    "lambda": lambda opt: lr_scheduler.LambdaLR(opt, lambda s: 1.0 / (1.0 + s)),
    "plateau": lambda opt: lr_scheduler.ReduceLROnPlateau(opt, factor=0.5, patience=0),
}


def _step_scheduler(sched: Any) -> None:
    if isinstance(sched, lr_scheduler.ReduceLROnPlateau):
        sched.step(1.0)  # a metric that never improves: the factor halves every step
    else:
        sched.step()


@pytest.mark.parametrize("name", sorted(SCHEDULERS))
def test_scheduler_scales_the_learned_step_size(name: str) -> None:
    model = _model()
    opt = stepsize_tower.TowerSGD(model.parameters(), lr=0.05, retreat=False)
    sched = SCHEDULERS[name](opt)
    # reference: the same scheduler on torch.optim.SGD gives the lr factor sequence
    ref_opt = torch.optim.SGD(_model().parameters(), lr=0.05)
    ref_sched = SCHEDULERS[name](ref_opt)
    for step in range(STEPS):
        factor = opt.param_groups[0]["lr"]
        assert factor == pytest.approx(ref_opt.param_groups[0]["lr"], rel=1e-12)
        opt.zero_grad()
        _loss(model, step).backward()
        grads = [p.grad.clone() for p in model.parameters()]
        before = [p.detach().clone() for p in model.parameters()]
        opt.step()
        group = opt.param_groups[0]
        used = float(group[EFFECTIVE_LR_KEY])
        # the step size the weights moved by, measured: <w_before - w, g> / <g, g>
        moved = sum(
            float(((b - p.detach()) * g).sum()) for p, b, g in zip(model.parameters(), before, grads, strict=True)
        )
        measured = moved / sum(float((g * g).sum()) for g in grads)
        assert used == pytest.approx(measured, rel=1e-10)
        assert opt.step_sizes()[0][0] == pytest.approx(measured, rel=1e-10)
        # reference: one torch.optim.SGD-style step w <- w - a g with that step size
        for p, b, g in zip(model.parameters(), before, grads, strict=True):
            torch.testing.assert_close(p.detach(), b - used * g, rtol=0, atol=1e-14)
        ref_opt.step()
        _step_scheduler(sched)
        _step_scheduler(ref_sched)


def test_closed_form_scheduler_does_not_erase_what_was_learned() -> None:
    """A LambdaLR that rewrites ``group["lr"]`` every step leaves the learned factor alone.

    Reference: the same tower without any scheduler (a constant-1 LambdaLR must not change a bit).
    """
    runs = []
    for use_sched in (False, True):
        model = _model()
        opt = stepsize_tower.TowerAdam(model.parameters(), lr=1e-3)
        sched = lr_scheduler.LambdaLR(opt, lambda s: 1.0) if use_sched else None
        for step in range(STEPS):
            opt.zero_grad()
            _loss(model, step).backward()
            opt.step()
            if sched is not None:
                sched.step()
        runs.append(
            (opt.param_groups[0]["tower"]["log_step"].clone(), [p.detach().clone() for p in model.parameters()])
        )
    assert torch.equal(runs[0][0], runs[1][0])
    assert float(runs[0][0][0, 0]) != 0.0  # something was learned
    for a, b in zip(runs[0][1], runs[1][1], strict=True):
        assert torch.equal(a, b)


def test_depth0_with_scheduler_matches_torch_optim() -> None:
    """reference: torch.optim.SGD + the same OneCycleLR, momentum cycling included (depth 0 = the plain optimizer)."""
    model, ref = _model(), _model()
    opt = stepsize_tower.TowerSGD(model.parameters(), lr=0.05, momentum=0.9, depth=0)
    ref_opt = torch.optim.SGD(ref.parameters(), lr=0.05, momentum=0.9)
    scheds = [lr_scheduler.OneCycleLR(o, max_lr=0.05, total_steps=STEPS) for o in (opt, ref_opt)]
    for step in range(STEPS):
        for m, o, s in ((model, opt, scheds[0]), (ref, ref_opt, scheds[1])):
            o.zero_grad()
            _loss(m, step).backward()
            o.step()
            s.step()
    for a, b in zip(model.parameters(), ref.parameters(), strict=True):
        torch.testing.assert_close(a, b, rtol=0, atol=1e-12)
