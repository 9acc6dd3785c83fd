"""The first-step limit of Adam-like towers: ``a_0 <- min(a_0, c * s)`` before the first step.

``s`` is the geometric mean over the group's nonzero tensors of their root-mean-square entry
(:mod:`stepsize_tower.safeguards`). References: the geometric mean from SciPy
(``scipy.stats.gmean``), and the first step itself from ``torch.optim.Adam`` at the limited
step size (one Adam step with a given lr is torch's; the tower must take exactly that step).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch
from scipy.stats import gmean
from torch import nn

from stepsize_tower import TowerAdam, TowerAdamW
from stepsize_tower.options import DEFAULT_FIRST_STEP_LIMIT


def _model(zero_last: bool = False) -> nn.Module:
    torch.manual_seed(0)
    model = nn.Sequential(nn.Embedding(20, 8), nn.Flatten(), nn.Linear(24, 16), nn.Tanh(), nn.Linear(16, 3)).double()
    with torch.no_grad():
        model[0].weight.mul_(10.0)  # a wide-scaled table, as embeddings often are
        if zero_last:
            model[4].weight.zero_()
            model[4].bias.zero_()
    return model


def _loss(model: nn.Module) -> torch.Tensor:
    gen = torch.Generator().manual_seed(1)
    x = torch.randint(0, 20, (32, 3), generator=gen)
    y = torch.randn(32, 3, generator=gen, dtype=torch.float64)
    return nn.functional.mse_loss(model(x), y)


def _scipy_scale(model: nn.Module) -> float:
    """Reference: SciPy's geometric mean of the nonzero per-tensor RMS values."""
    rms = [float(np.sqrt(np.mean(p.detach().numpy() ** 2))) for p in model.parameters()]
    nonzero = [r for r in rms if r > 0]
    return float(gmean(nonzero)) if nonzero else 0.0


def _first_step(model: nn.Module, opt: torch.optim.Optimizer) -> list[torch.Tensor]:
    opt.zero_grad()
    _loss(model).backward()
    opt.step()
    return [p.detach().clone() for p in model.parameters()]


def _torch_adam_first_step(lr: float, zero_last: bool = False, **kwargs: float) -> list[torch.Tensor]:
    model = _model(zero_last)
    return _first_step(model, torch.optim.Adam(model.parameters(), lr=lr, **kwargs))


@pytest.mark.parametrize("zero_last", [False, True], ids=["all_nonzero", "zero_tensors_skipped"])
def test_step_size_above_the_weights_is_cut_to_the_limit_times_their_geometric_mean_size(zero_last: bool) -> None:
    model = _model(zero_last)
    cap = DEFAULT_FIRST_STEP_LIMIT * _scipy_scale(model)
    assert 0 < cap < 10.0
    opt = TowerAdam(model.parameters(), lr=10.0)
    got = _first_step(model, opt)
    assert opt.step_sizes()[0][0] == pytest.approx(cap, rel=1e-12)
    for w, ref in zip(got, _torch_adam_first_step(cap, zero_last), strict=True):
        torch.testing.assert_close(w, ref, rtol=1e-12, atol=1e-14)


def test_step_size_below_the_limit_is_untouched() -> None:
    model = _model()
    lr = 0.1 * DEFAULT_FIRST_STEP_LIMIT * _scipy_scale(model)
    opt = TowerAdam(model.parameters(), lr=lr)
    got = _first_step(model, opt)
    assert opt.step_sizes()[0][0] == lr
    for w, ref in zip(got, _torch_adam_first_step(lr), strict=True):
        torch.testing.assert_close(w, ref, rtol=1e-12, atol=1e-14)


@pytest.mark.parametrize(
    "make",
    [
        lambda ps: TowerAdam(ps, lr=10.0, first_step_limit=None),  # turned off
        lambda ps: TowerAdam(ps, lr=10.0, depth=0),  # nothing learned: a fixed rate is what was asked
    ],
    ids=["limit_none", "depth_0"],
)
def test_without_the_limit_the_first_step_is_torch_adams_at_the_typed_lr(make) -> None:
    model = _model()
    got = _first_step(model, make(model.parameters()))
    for w, ref in zip(got, _torch_adam_first_step(10.0), strict=True):
        torch.testing.assert_close(w, ref, rtol=1e-12, atol=1e-14)


def test_all_zero_weights_carry_no_scale_and_are_not_limited() -> None:
    w = torch.zeros(5, dtype=torch.float64, requires_grad=True)
    opt = TowerAdam([w], lr=3.0)
    w.grad = torch.tensor([1.0, -2.0, 3.0, -4.0, 5.0], dtype=torch.float64)
    opt.step()
    assert opt.step_sizes()[0][0] == 3.0
    # Adam's first step is lr * g / (|g| + eps): every weight moves by lr (torch.optim.Adam's rule)
    torch.testing.assert_close(w.detach(), -3.0 * torch.sign(w.grad), rtol=1e-7, atol=0)


def test_tensor_granularity_limits_each_tensor_by_its_own_size() -> None:
    model = _model()
    rms = [float(np.sqrt(np.mean(p.detach().numpy() ** 2))) for p in model.parameters()]
    lr = DEFAULT_FIRST_STEP_LIMIT * float(np.sqrt(min(rms) * max(rms)))  # between the smallest and largest cap
    opt = TowerAdam(model.parameters(), lr=lr, granularity="tensor")
    _first_step(model, opt)
    got = opt.step_size_tensors()[0][:, 0].tolist()
    want = [min(lr, DEFAULT_FIRST_STEP_LIMIT * r) for r in rms]
    assert got == pytest.approx(want, rel=1e-12)
    assert any(g < lr for g in got) and any(g == lr for g in got)  # the wide table is not cut


def test_limit_applies_once_and_the_levels_take_over() -> None:
    model = _model()
    opt = TowerAdamW(model.parameters(), lr=10.0)
    cap = DEFAULT_FIRST_STEP_LIMIT * _scipy_scale(model)
    _first_step(model, opt)
    assert opt.step_sizes()[0][0] == pytest.approx(cap, rel=1e-12)
    _first_step(model, opt)
    assert opt.retreats() == 0
    # The second step is the levels' own: the default level 1 ("adam", step 0.05) moves log a_0 by
    # 0.05 d_1, and its first direction is m̂/(sqrt(v̂) + 1e-30) = sign(ĥ_1) (Adam's bias correction,
    # Kingma & Ba 2015): a_0 = cap * exp(-0.05 sign(ĥ_1)), not cut again.
    h1 = float(opt.param_groups[0]["tower"]["hypergrad"][0, 0])
    assert abs(h1) > 1e-20
    assert opt.step_sizes()[0][0] == pytest.approx(cap * math.exp(-0.05 * math.copysign(1.0, h1)), rel=1e-12)


@pytest.mark.parametrize("bad", [0, -1.0, float("nan"), float("inf"), True, "0.5"])
def test_invalid_limit_is_rejected_with_the_fix(bad) -> None:
    with pytest.raises(ValueError, match=r"first_step_limit.*None to turn the limit off"):
        TowerAdam([torch.zeros(2, requires_grad=True)], lr=1.0, first_step_limit=bad)
    opt = TowerAdam([torch.zeros(2, requires_grad=True)], lr=1.0)
    with pytest.raises(ValueError, match="first_step_limit"):
        opt.add_param_group({"params": [torch.zeros(2, requires_grad=True)], "first_step_limit": bad})
