"""The level-0 hypergradient with a horizon: the gradient against a decaying trail of updates.

With horizon γ, ``ĥ_1 = -<g_s, D_{s-1}>`` where ``D_{s-1} = Σ_j γ^(s-1-j) (w_{j-1} - w_j)``.
This is the derivative of ``L_s(w_{s-1})`` with respect to a perturbation ε of ``log a_0``
applied to every past step ``j`` with weight ``γ^(s-1-j)``, holding the directions fixed.
"""

from __future__ import annotations

import pytest
import torch
from small_problems import recorded_run, tanh_regression

from stepsize_tower import TowerAdam, TowerAdamW, TowerSGD


@pytest.mark.parametrize(
    "factory",
    [
        lambda p, h: TowerSGD(p, lr=0.3, horizon=h, retreat=False),
        lambda p, h: TowerSGD(p, lr=0.1, momentum=0.9, horizon=h, retreat=False),
        lambda p, h: TowerAdam(p, lr=0.01, horizon=h, retreat=False),
        lambda p, h: TowerAdamW(p, lr=0.01, weight_decay=0.1, horizon=h, retreat=False),
    ],
    ids=["sgd", "momentum", "adam", "adamw"],
)
@pytest.mark.parametrize("horizon", [0.5, 0.9, 0.99])
def test_horizon_hypergradient_is_gradient_against_trail_of_recorded_updates(factory, horizon):
    loss = tanh_regression()
    w = torch.zeros(8, dtype=torch.float64, requires_grad=True)
    opt = factory([w], horizon)
    steps = 9
    history, g_s = recorded_run(opt, w, loss, steps)
    # reference: the definition, from the recorded weights (independent of the optimizer's buffers)
    s = steps - 1
    trail = sum(horizon ** (s - 1 - j) * (history[j] - history[j + 1]) for j in range(s))
    expected = -torch.dot(g_s, trail).item()
    got = opt.param_groups[0]["tower"]["hypergrad"][0, 0].item()
    assert abs(expected) > 1e-8
    assert got == pytest.approx(expected, rel=1e-9, abs=1e-15)


def test_horizon_hypergradient_matches_autograd_through_unrolled_steps():
    """Reference: autograd through the unrolled weight trajectory, directions held fixed."""
    loss = tanh_regression()
    horizon = 0.8
    w = torch.zeros(8, dtype=torch.float64, requires_grad=True)
    opt = TowerSGD([w], lr=0.2, horizon=horizon, retreat=False)
    directions, step_sizes = [], []
    for s in range(7):
        opt.zero_grad()
        loss(w, s).backward()
        directions.append(w.grad.clone())  # plain SGD: d_j = g_j
        opt.step()
        step_sizes.append(opt.param_groups[0]["tower"]["prev_step"][0, 0].item())
    g_next = torch.autograd.grad(loss(w, 7), w)[0]
    w.grad = g_next.clone()
    opt.step()
    got = opt.param_groups[0]["tower"]["hypergrad"][0, 0]

    eps = torch.zeros((), dtype=torch.float64, requires_grad=True)
    w_unrolled = torch.zeros(8, dtype=torch.float64)
    last = len(directions) - 1
    for j, (d, a) in enumerate(zip(directions, step_sizes, strict=True)):
        w_unrolled = w_unrolled - a * torch.exp(horizon ** (last - j) * eps) * d
    (expected,) = torch.autograd.grad(loss(w_unrolled, 7), eps)
    assert got.item() == pytest.approx(expected.item(), rel=1e-9)


def test_horizon_zero_is_the_one_step_hypergradient():
    """Reference: Baydin et al., ICLR 2018 (SGD-HD): ĥ_1 = -a_0 <g_s, g_{s-1}> for plain SGD."""
    loss = tanh_regression()
    w = torch.zeros(8, dtype=torch.float64, requires_grad=True)
    opt = TowerSGD([w], lr=0.3, horizon=0, retreat=False)
    grads = []
    for s in range(4):
        opt.zero_grad()
        loss(w, s).backward()
        grads.append(w.grad.clone())
        a_before = opt.step_sizes()[0][0]  # the step size used by the previous step
        opt.step()
    got = opt.param_groups[0]["tower"]["hypergrad"][0, 0].item()
    assert got == pytest.approx(-a_before * torch.dot(grads[-1], grads[-2]).item(), rel=1e-12)


def test_invalid_horizon_names_the_argument():
    with pytest.raises(ValueError, match="horizon"):
        TowerAdam([torch.zeros(2, requires_grad=True)], horizon=1.0)
