"""The safeguards at both ends of the initial step size, pinned on small deterministic problems.

* Too large (1e4 x a good step size): the first step would wreck the model; the retreat takes
  it back and the run recovers without NaN, ending near a well-tuned fixed-rate run.
* Too small (1e-6 x a good step size): the levels grow the step size by at least 1e4 x within
  a few hundred steps.

"Good step size" is the usual one for each problem: 1/L for gradient descent on a quadratic
with largest curvature L, 1e-2 for Adam on a small network (common practice).
"""

from __future__ import annotations

import math

import pytest
import torch
from small_problems import network_task, quadratic

from stepsize_tower import TowerAdam, TowerSGD


def _train(opt: torch.optim.Optimizer, loss, steps: int) -> float:
    for _ in range(steps):
        opt.zero_grad()
        value = loss()
        value.backward()
        opt.step()
    with torch.no_grad():
        return float(loss())


def test_sgd_started_1e4_times_too_large_recovers_on_aquadratic():
    loss = quadratic()
    w = torch.zeros(10, dtype=torch.float64, requires_grad=True)
    initial = float(loss(w.detach()))
    opt = TowerSGD([w], lr=1e4)  # 1e4 x 1/L
    final = _train(opt, lambda: loss(w), 300)
    assert opt.retreats() >= 1
    assert all(math.isfinite(a) and a > 0 for a in opt.step_sizes()[0])
    assert math.isfinite(final)
    assert final <= 1e-6 * initial  # reference: gradient descent at 1/L shrinks it by (1 - 0.1)^300 ≈ 2e-14


@pytest.mark.parametrize("too_large", [10.0, 100.0])
def test_adam_started_1e3_to_1e4_times_too_large_recovers_on_a_network(too_large):
    model, loss = network_task()
    tuned_model, tuned_loss = network_task()
    tuned = _train(torch.optim.Adam(tuned_model.parameters(), lr=1e-2), tuned_loss, 300)  # reference: torch.optim
    opt = TowerAdam(model.parameters(), lr=too_large)
    _train(opt, loss, 1)
    first = opt.step_sizes()[0][0]
    final = _train(opt, loss, 299)
    assert opt.retreats() >= 1 or first < 0.01 * too_large  # a safeguard acted: retreat or first-step limit
    assert all(torch.isfinite(p).all() for p in model.parameters())
    assert math.isfinite(final)
    assert final <= max(1.25 * tuned, tuned + 0.01)  # the sensitivity benchmark's "good" rule


def test_plain_fixed_rate_at_the_same_large_step_does_wreck_the_network():
    """The recovery above is the safeguard's doing: without it the same start is ruined."""
    model, loss = network_task()
    tuned_model, tuned_loss = network_task()
    tuned = _train(torch.optim.Adam(tuned_model.parameters(), lr=1e-2), tuned_loss, 300)
    final = _train(torch.optim.Adam(model.parameters(), lr=100.0), loss, 300)
    assert not final <= max(1.25 * tuned, tuned + 0.01)


@pytest.mark.parametrize(
    ("factory", "good"),
    [
        (lambda p, lr: TowerSGD(p, lr=lr), 1.0),
        (lambda p, lr: TowerSGD(p, lr=lr, momentum=0.9), 0.1),
        # Adam: 7.5e3x at horizon 0.999 until the trail forgot steps taken at far larger rates.
        (lambda p, lr: TowerAdam(p, lr=lr), 1e-2),
        (lambda p, lr: TowerAdam(p, lr=lr, horizon=0.99), 1e-2),
    ],
    ids=["sgd", "momentum", "adam", "adam-horizon-0.99"],
)
def test_step_size_started_1e6_times_too_small_grows_1e4_times_within_300_steps(factory, good):
    loss = quadratic()
    w = torch.zeros(10, dtype=torch.float64, requires_grad=True)
    start = good * 1e-6
    opt = factory([w], start)
    _train(opt, lambda: loss(w), 300)
    assert opt.step_sizes()[0][0] >= 1e4 * start


@pytest.mark.parametrize("momentum", [0.0, 0.9], ids=["sgd", "momentum"])
def test_gradient_spike_after_the_start_up_window_takes_the_last_step_back(momentum):
    """Past the start-up window only the growth guard can retreat (the module's documented rule):
    a gradient RETREAT_GROWTH+ times the largest seen moves the weights back along the last
    direction, ``w <- w + (a_prev - a_new) d``, with ``a_new = a_prev / (1 + r)``, and the
    spiking gradient is discarded."""
    from stepsize_tower.safeguards import RETREAT_BLOWUP as RETREAT_GROWTH
    from stepsize_tower.safeguards import RETREAT_WINDOW

    w = torch.zeros(4, dtype=torch.float64, requires_grad=True)
    opt = TowerSGD([w], lr=0.01, momentum=momentum)
    steady = torch.tensor([1.0, -0.5, 0.25, 2.0], dtype=torch.float64)
    for _ in range(RETREAT_WINDOW + 5):
        w.grad = steady.clone()
        opt.step()
    assert opt.retreats() == 0
    a_prev = opt.step_sizes()[0][0]
    last_direction = opt.state[w]["momentum_buffer"].clone() if momentum else steady
    before = w.detach().clone()

    spike = 4 * RETREAT_GROWTH  # r = |g|_max / the largest entry seen (2.0)
    w.grad = steady * spike
    opt.step()

    assert opt.retreats() == 1 and opt.skipped_steps() == 0
    a_new = a_prev / (1 + spike)
    assert opt.step_sizes()[0][0] == pytest.approx(a_new, rel=1e-12)
    torch.testing.assert_close(w.detach(), before + (a_prev - a_new) * last_direction, rtol=1e-12, atol=1e-15)
    if momentum:  # the spike never entered the momentum buffer
        torch.testing.assert_close(opt.state[w]["momentum_buffer"], last_direction, rtol=0, atol=0)


@pytest.mark.xfail(
    strict=True,
    reason=(
        "recorded defect (measured): full batch, TowerSGD's level grows a_0 past the network's "
        "stability edge (fixed SGD: 0.3 ends at 0.067, 1.0 diverges; the tower reaches 1.1 by "
        "step 50); the instability starts abruptly (largest gradient entry x1.6, x4.6, x6 per step, "
        "each under the guard's 10x), the loss spikes to 1.2e5, the guard cuts a_0 80x and the "
        "level, its second moment full of the spike, regrows slowly: 0.44 after 500 steps from lr 0.1"
    ),
)
def test_sgd_on_a_full_batch_network_ends_near_the_best_fixed_rate():
    # reference: torch.optim.SGD's best final loss over a grid of fixed rates
    best = math.inf
    for lr in (0.01, 0.03, 0.1, 0.3, 1.0):
        model, loss = network_task()
        final = _train(torch.optim.SGD(model.parameters(), lr=lr), loss, 500)
        best = min(best, final) if math.isfinite(final) else best
    model, loss = network_task()
    final = _train(TowerSGD(model.parameters(), lr=0.1), loss, 500)
    assert final <= max(1.25 * best, best + 0.01)
