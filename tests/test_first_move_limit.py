"""SGD's first-move limit: ``a_0 <- min(a_0, c · s_w / s_g)`` on the first step (``c = 10``).

``s_w`` and ``s_g`` are the geometric means over the group's nonzero tensors of the weights'
and the gradients' root-mean-square entry (:mod:`stepsize_tower.safeguards`). References: the
geometric mean from SciPy (``scipy.stats.gmean``), the first step from ``torch.optim.SGD`` at
the limited step size, and the least-squares optimum from ``numpy.linalg.lstsq``.
"""

from __future__ import annotations

import pytest
import torch
from scipy.stats import gmean
from torch import nn

from stepsize_tower import TowerSGD
from stepsize_tower.safeguards import FIRST_MOVE_LIMIT


def _model() -> nn.Module:
    torch.manual_seed(0)
    return nn.Sequential(nn.Linear(5, 8), nn.Tanh(), nn.Linear(8, 2)).double()


def _first_step(model: nn.Module, opt: torch.optim.Optimizer) -> None:
    gen = torch.Generator().manual_seed(1)
    x, y = (
        torch.randn(16, 5, generator=gen, dtype=torch.float64),
        torch.randn(16, 2, generator=gen, dtype=torch.float64),
    )
    opt.zero_grad()
    nn.functional.mse_loss(model(x), y).backward()
    opt.step()


def _rms(t: torch.Tensor) -> float:
    return float(t.detach().pow(2).mean().sqrt())


@pytest.mark.parametrize("momentum", [0.0, 0.9])
def test_a_first_step_moving_the_weights_more_than_ten_times_their_size_is_cut_to_that(momentum: float) -> None:
    model, ref = _model(), _model()
    opt = TowerSGD(model.parameters(), lr=1e4, momentum=momentum)
    _first_step(model, opt)
    grads = [p.grad for p in model.parameters()]
    limited = FIRST_MOVE_LIMIT * gmean([_rms(p) for p in ref.parameters()]) / gmean([_rms(g) for g in grads])
    assert opt.step_sizes()[0][0] == pytest.approx(limited, rel=1e-12)
    ref_opt = torch.optim.SGD(ref.parameters(), lr=limited, momentum=momentum)
    _first_step(ref, ref_opt)
    for p, q in zip(model.parameters(), ref.parameters(), strict=True):
        torch.testing.assert_close(p, q, rtol=1e-12, atol=1e-14)


def test_a_first_step_within_the_limit_is_untouched() -> None:
    model = _model()
    opt = TowerSGD(model.parameters(), lr=1e-3)
    _first_step(model, opt)
    assert opt.step_sizes()[0][0] == pytest.approx(1e-3, rel=1e-12)


def test_a_float32_first_step_a_billion_times_too_large_is_undone_to_float32_precision() -> None:
    """Features scaled 1e-2 ... 1e3, typed 1e3 (about 1e9 times the stable rate). The retreat
    undoes the first step arithmetically, ``w + (a - a') g``; had the step moved the weights
    ~1e8 times their size (no limit), float32 would keep nothing of them (measured on the field
    benchmark's raw least squares: every later step retreated, loss 5e6 against 10). Reference:
    the retried step from the initial weights in float64, ``w_0 - a' g_0``."""
    gen = torch.Generator().manual_seed(0)
    x = torch.logspace(-2, 3, 6) * (torch.rand(6, generator=gen) + torch.randn(256, 6, generator=gen))
    y = torch.randn(256, generator=gen)
    torch.manual_seed(0)
    model = nn.Linear(6, 1)
    w0 = [p.detach().double().clone() for p in model.parameters()]
    opt = TowerSGD(model.parameters(), lr=1e3)
    grads = []
    for _ in range(2):
        opt.zero_grad()
        nn.functional.mse_loss(model(x).squeeze(-1), y).backward()
        grads.append([p.grad.double().clone() for p in model.parameters()])  # type: ignore[union-attr]
        opt.step()
    assert opt.retreats() == 1
    a_new = opt.step_sizes()[0][0]
    for p, w, g in zip(model.parameters(), w0, grads[0], strict=True):
        want = w - a_new * g
        err = float((p.detach().double() - want).abs().max())
        assert err <= 1e-5 * float(want.abs().max()), (err, float(want.abs().max()))


def test_without_retreats_the_first_step_is_torch_sgds_at_the_typed_lr() -> None:
    """The limit exists so that a retreat can undo the step: ``retreat=False`` keeps the typed
    rate. Reference: ``torch.optim.SGD`` at lr 1e4."""
    model, ref = _model(), _model()
    opt = TowerSGD(model.parameters(), lr=1e4, retreat=False)
    _first_step(model, opt)
    assert opt.step_sizes()[0][0] == 1e4
    _first_step(ref, torch.optim.SGD(ref.parameters(), lr=1e4))
    for p, q in zip(model.parameters(), ref.parameters(), strict=True):
        torch.testing.assert_close(p, q, rtol=1e-12, atol=1e-14)
