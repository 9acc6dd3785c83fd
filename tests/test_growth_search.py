"""The start-up growth search: a step size typed far too small becomes useful in tens of steps.

Pinned on deterministic quadratics whose curvatures are known, so every claim has an outside
reference: gradient descent on a quadratic with largest curvature L is stable and never raises
the loss for step sizes up to 2/L (the descent lemma); along a direction d on a 1-D quadratic
with curvature λ the loss's slope after a step a is (1 - aλ) times the slope before it, so the
slope keeps half its value exactly while aλ < 1/2 (common practice).
"""

from __future__ import annotations

import copy
import itertools
import math

import pytest
import torch
from small_problems import CURVATURES, network_task, quadratic

from stepsize_tower import TowerAdam, TowerSGD


def _run(opt: torch.optim.Optimizer, w: torch.Tensor, loss, steps: int) -> tuple[list[float], list[float]]:
    """Train; return the loss after every step and the step size each step used."""
    losses, sizes = [], []
    for _ in range(steps):
        opt.zero_grad()
        loss(w).backward()
        opt.step()
        losses.append(float(loss(w).detach()))
        sizes.append(opt.step_sizes()[0][0])  # type: ignore[attr-defined]
    return losses, sizes


def _search(opt: torch.optim.Optimizer) -> float:
    return float(opt.param_groups[0]["tower"]["search"][0])


def test_search_grows_a_step_size_1e6_times_too_small_to_a_useful_one_within_60_steps():
    # reference: the quadratic's largest curvature L = 1, good step size 1/L (common practice)
    loss = quadratic()
    initial = float(loss(torch.zeros(10, dtype=torch.float64)))
    results = {}
    for search in (0.5, None):
        w = torch.zeros(10, dtype=torch.float64, requires_grad=True)
        results[search] = _run(TowerSGD([w], lr=1e-6, growth_search=search), w, loss, 100)
    (losses, sizes), (plain_losses, plain_sizes) = results[0.5], results[None]
    assert sizes[59] >= 0.1  # 1e5 x the typed value (measured: 1.12)
    assert plain_sizes[59] < 1e-3  # the levels alone are still climbing (measured: 4.7e-5)
    assert losses[99] <= 1e-6 * initial  # measured: 7e-10 of the initial loss
    assert plain_losses[99] >= 0.5 * initial  # measured: 0.96


def test_search_keeps_the_step_size_below_the_stability_limit_and_the_loss_falling():
    # reference: descent lemma, gradient descent on a quadratic with a <= 2/L never raises the loss
    loss = quadratic()
    limit = 2.0 / float(CURVATURES.max())
    w = torch.zeros(10, dtype=torch.float64, requires_grad=True)
    opt = TowerSGD([w], lr=1e-6, growth_search=0.5)
    losses, sizes = _run(opt, w, loss, 300)
    assert _search(opt) == -1.0  # the search ended
    assert max(sizes) < limit, f"step size {max(sizes):.3g} passed 2/L = {limit}"
    rises = [(t, a, b) for t, (a, b) in enumerate(itertools.pairwise(losses)) if b > a * (1 + 1e-9) + 1e-30]
    assert not rises, f"the loss rose at {rises[:3]}"


@pytest.mark.parametrize("retreat", [True, False], ids=["retreat", "no_retreat"])
def test_search_ends_once_a_step_kept_less_than_half_the_slope_on_a_1d_quadratic(retreat: bool):
    # reference: on f(w) = λ w² / 2, a gradient step a scales the slope along it by 1 - aλ
    # (closed form), so the search must go on exactly while every step had aλ < 1/2
    lam = 3.0
    w = torch.ones(1, dtype=torch.float64, requires_grad=True)
    opt = TowerSGD([w], lr=1e-5, growth_search=0.5, retreat=retreat)
    searched, sizes = [], []
    for _ in range(80):
        opt.zero_grad()
        (0.5 * lam * w.pow(2).sum()).backward()
        opt.step()
        sizes.append(opt.step_sizes()[0][0])
        searched.append(_search(opt))
    end = searched.index(-1.0)  # the step at which the test failed
    assert end >= 20, "the search should have run for a while from 1e-5"
    assert all(a * lam < 0.5 for a in sizes[: end - 1])  # every step the search accepted
    assert sizes[end - 1] * lam >= 0.5  # the step it rejected
    assert all(s == -1.0 for s in searched[end:])  # for good
    assert searched[end - 1] == end - 1  # it counted every step before


def test_a_retreat_ends_the_search():
    # reference: the growth guard's trigger, a gradient entry 10x above its peak (see tower.py)
    loss = quadratic()
    w = torch.zeros(10, dtype=torch.float64, requires_grad=True)
    opt = TowerSGD([w], lr=1e-6, growth_search=0.5)
    _run(opt, w, loss, 5)
    assert _search(opt) == 4.0  # searching since the second step
    opt.zero_grad()
    (1e3 * loss(w)).backward()  # a spike: every gradient entry 1000x
    opt.step()
    assert opt.retreats() == 1
    assert _search(opt) == -1.0
    _run(opt, w, loss, 5)
    assert _search(opt) == -1.0


def test_search_speeds_up_adam_on_a_full_batch_network():
    # reference: the typed step size and the levels alone from it (a behaviour, not a value)
    sizes = {}
    for search in (0.5, None):
        model, loss = network_task()
        opt = TowerAdam(model.parameters(), lr=1e-7, growth_search=search)
        for _ in range(50):
            opt.zero_grad()
            loss().backward()
            opt.step()
        sizes[search] = opt.step_sizes()[0][0]
    assert sizes[0.5] >= 1e4 * 1e-7  # measured: 4.7e-3
    assert sizes[0.5] >= 100 * sizes[None]  # measured: 2e-6 without the search


@pytest.mark.parametrize("value", [0, -0.5, 1.5, math.nan, math.inf, True, "0.5"])
def test_invalid_growth_search_is_rejected_with_the_fix(value):
    w = torch.zeros(2, requires_grad=True)
    with pytest.raises(ValueError, match=r"growth_search.*None to turn the search off"):
        TowerSGD([w], growth_search=value)
    opt = TowerAdam([w])
    with pytest.raises(ValueError, match=r"growth_search"):
        opt.add_param_group({"params": [torch.zeros(3, requires_grad=True)], "growth_search": value})


def test_a_run_resumed_mid_search_continues_exactly():
    # reference: the same run without the interruption (common practice for checkpoints)
    loss = quadratic()

    def fresh() -> tuple[torch.Tensor, TowerSGD]:
        w = torch.zeros(10, dtype=torch.float64, requires_grad=True)
        return w, TowerSGD([w], lr=1e-6, growth_search=0.5)

    w, opt = fresh()
    _run(opt, w, loss, 8)
    assert _search(opt) > 0
    saved_w, saved = w.detach().clone(), copy.deepcopy(opt.state_dict())
    losses, sizes = _run(opt, w, loss, 20)

    w2, opt2 = fresh()
    with torch.no_grad():
        w2.copy_(saved_w)
    opt2.load_state_dict(saved)
    losses2, sizes2 = _run(opt2, w2, loss, 20)
    assert sizes2 == sizes and losses2 == losses
    assert torch.equal(w2, w)


def test_a_state_saved_before_the_search_existed_resumes_without_it():
    # reference: the same run with growth_search=None from the same state
    loss = quadratic()
    w = torch.zeros(10, dtype=torch.float64, requires_grad=True)
    opt = TowerSGD([w], lr=1e-6, growth_search=None)
    _run(opt, w, loss, 5)
    old = copy.deepcopy(opt.state_dict())
    for group in old["param_groups"]:  # what an older release wrote
        del group["growth_search"]
        del group["tower"]["search"]
    start = w.detach().clone()
    expected, _ = _run(opt, w, loss, 30)

    w2 = start.clone().requires_grad_(True)
    opt2 = TowerSGD([w2], lr=1e-6, growth_search=0.5)  # asks for it; the loaded groups do not
    opt2.load_state_dict(old)
    got, _ = _run(opt2, w2, loss, 30)
    assert got == expected
