"""Mixed precision: GradScaler overflow steps leave every level untouched; learned values stay float64."""

from __future__ import annotations

import copy

import pytest
import torch
from torch import nn

import stepsize_tower
from stepsize_tower.tower import EFFECTIVE_LR_KEY


def _setup(opt_cls: type, dtype: torch.dtype = torch.float32) -> tuple[nn.Module, torch.optim.Optimizer]:
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(6, 16), nn.ReLU(), nn.Linear(16, 1)).to(dtype)
    return model, opt_cls(model.parameters(), lr=1e-2)


def _batch(step: int, dtype: torch.dtype = torch.float32) -> tuple[torch.Tensor, torch.Tensor]:
    gen = torch.Generator().manual_seed(step)
    x = torch.randn(32, 6, generator=gen)
    return x.to(dtype), x.sum(dim=1, keepdim=True).to(dtype)


def _snapshot(model: nn.Module, opt: torch.optim.Optimizer) -> tuple[list[torch.Tensor], dict]:
    return [p.detach().clone() for p in model.parameters()], copy.deepcopy(opt.state_dict())


def _assert_untouched(model: nn.Module, opt: torch.optim.Optimizer, snap: tuple[list[torch.Tensor], dict]) -> None:
    weights, state = snap
    for p, w in zip(model.parameters(), weights, strict=True):
        assert torch.equal(p.detach(), w)
    now = opt.state_dict()
    for g_before, g_now in zip(state["param_groups"], now["param_groups"], strict=True):
        for key, value in g_before["tower"].items():
            if key != "skipped":
                assert torch.equal(value, g_now["tower"][key]), key
        assert torch.equal(g_before[EFFECTIVE_LR_KEY], g_now[EFFECTIVE_LR_KEY])
    for idx, st in state["state"].items():
        for key, value in st.items():
            assert torch.equal(torch.as_tensor(value), torch.as_tensor(now["state"][idx][key])), key


@pytest.mark.parametrize("opt_cls", [stepsize_tower.TowerAdam, stepsize_tower.TowerSGD])
def test_grad_scaler_overflow_step_leaves_every_level_untouched(opt_cls: type) -> None:
    model, opt = _setup(opt_cls)
    scaler = torch.amp.GradScaler("cpu", init_scale=2.0**10)
    for step in range(6):
        if step == 4:
            snap = _snapshot(model, opt)
            scale_before = scaler.get_scale()
        opt.zero_grad()
        x, y = _batch(step)
        with torch.autocast("cpu", dtype=torch.bfloat16):
            loss = nn.functional.mse_loss(model(x).float(), y)
        scaler.scale(loss).backward()
        if step == 4:
            next(model.parameters()).grad[0, 0] = float("inf")  # an overflow, as a too-large scale makes
        scaler.step(opt)
        scaler.update()
        if step == 4:
            # reference: torch.amp.GradScaler skips optimizer.step() on inf and halves its scale
            assert scaler.get_scale() == scale_before * 0.5
            _assert_untouched(model, opt, snap)
            assert opt.skipped_steps() == 0  # step() was never called
    assert int(opt.param_groups[0]["tower"]["step"]) == 5


@pytest.mark.parametrize("bad", [float("inf"), float("nan")])
def test_direct_step_with_non_finite_gradient_is_skipped(bad: float) -> None:
    model, opt = _setup(stepsize_tower.TowerAdam)
    for step in range(4):
        opt.zero_grad()
        nn.functional.mse_loss(model(_batch(step)[0]), _batch(step)[1]).backward()
        if step == 3:
            snap = _snapshot(model, opt)
            list(model.parameters())[2].grad[0, 1] = bad
        opt.step()
    _assert_untouched(model, opt, snap)
    assert opt.skipped_steps() == 1


@pytest.mark.parametrize("param_dtype", [torch.float32, torch.bfloat16])
def test_step_sizes_are_stored_in_float64(param_dtype: torch.dtype) -> None:
    model, opt = _setup(stepsize_tower.TowerAdamW, param_dtype)
    scaler = torch.amp.GradScaler("cpu")
    for step in range(5):
        opt.zero_grad()
        x, y = _batch(step, param_dtype)
        with torch.autocast("cpu", dtype=torch.bfloat16):
            loss = nn.functional.mse_loss(model(x).float(), y.float())
        scaler.scale(loss).backward()
        scaler.step(opt)
        scaler.update()
    group = opt.param_groups[0]
    assert all(v.dtype == torch.float64 for v in group["tower"].values())
    assert group[EFFECTIVE_LR_KEY].dtype == torch.float64
    # survives a checkpoint round trip (torch casts floating per-parameter state to the param dtype)
    opt2 = stepsize_tower.TowerAdamW(model.parameters(), lr=1e-2)
    opt2.load_state_dict(copy.deepcopy(opt.state_dict()))
    assert all(v.dtype == torch.float64 for v in opt2.param_groups[0]["tower"].values())
    assert opt2.param_groups[0][EFFECTIVE_LR_KEY].dtype == torch.float64
