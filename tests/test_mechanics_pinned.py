"""The start-up safeguards and the bounds, each pinned against a computation done here by hand.

Gradients are written straight into ``.grad`` (float64), so every ratio below is exact by
construction. References:

* a retreat redoes the last step with the secant step size ``a (1 / (1 - rho))`` (the minimizer
  of a quadratic along the step; ``rho`` the ratio of the slopes at its end and start), clipped
  to ``[1e-4, 1/2] a`` (README, "Safeguards"). The redone step must be torch.optim's own step
  (``torch.optim.SGD`` / ``Adam`` / ``AdamW``) from the state before it, at the new step size;
* the start-up window: the first 10 taken steps (README, "Safeguards");
* the level arithmetic: each level moves the log step size below it by ``clip(a_k d_k, ±1)``,
  ``d_k`` of an "adam" level being torch.optim.Adam's direction, and log step sizes are kept in
  ``[-69, 69]`` (``stepsize_tower.levels``);
* the growth search's boost ``1.1^n`` on level 1's move, ``n`` the steps searched before
  (``stepsize_tower.levels``);
* learned momentum: its logit moved by torch.optim.Adam with the stored hypergradient
  (``stepsize_tower.hyper``).
"""

from __future__ import annotations

import math
from typing import Any

import pytest
import torch
from torch import Tensor

from stepsize_tower import Level, TowerAdam, TowerAdamW, TowerSGD
from stepsize_tower.safeguards import RETREAT_MIN_FACTOR

DTYPE = torch.float64
WINDOW = 10  # the start-up window, in taken steps (README)
MAX_LOG_CHANGE = 1.0  # largest move of a log step size per step (levels module docstring)
LOG_STEP_BOUND = 69.0  # log step sizes are clamped to ±69 (levels module docstring)
SPEEDUP = 1.1  # the growth search's boost grows by this factor per searched step


def _grad(step: int, n: int = 6) -> Tensor:
    """A fixed gradient for ``step``: positive entries, so consecutive ones agree."""
    gen = torch.Generator().manual_seed(step)
    return 0.5 + torch.rand(n, generator=gen, dtype=DTYPE)


def _level0(opt: torch.optim.Optimizer) -> float:
    return opt.step_sizes()[0][0]  # type: ignore[attr-defined, no-any-return]


# ---------------------------------------------------------------------------- retreats

BASES: dict[str, tuple[Any, Any, dict[str, Any]]] = {
    # name: (tower class, torch.optim reference, shared kwargs)
    "sgd": (TowerSGD, torch.optim.SGD, {"lr": 0.1}),
    "sgd_momentum": (TowerSGD, torch.optim.SGD, {"lr": 0.1, "momentum": 0.9}),
    "sgd_nesterov": (TowerSGD, torch.optim.SGD, {"lr": 0.1, "momentum": 0.9, "nesterov": True}),
    "adam": (TowerAdam, torch.optim.Adam, {"lr": 0.01}),
    "adamw": (TowerAdamW, torch.optim.AdamW, {"lr": 0.01, "weight_decay": 0.5}),
}


def _torch_step_from(
    ref_cls: Any, kwargs: dict[str, Any], w: Tensor, state: dict[str, Tensor], grad: Tensor, lr: float
) -> Tensor:
    """One torch.optim step from weights ``w`` and base state ``state`` with gradient ``grad`` at ``lr``."""
    p = w.clone().requires_grad_()
    ref = ref_cls([p], **{**kwargs, "lr": lr, "foreach": False})
    if state:
        ref.state[p] = {k: v.clone() for k, v in state.items()}
    p.grad = grad.clone()
    ref.step()
    return p.detach()


def _base_state(opt: torch.optim.Optimizer, p: Tensor) -> dict[str, Tensor]:
    """The base optimizer's own per-parameter state (the keys torch.optim uses)."""
    keys = ("momentum_buffer", "exp_avg", "exp_avg_sq", "step")
    return {k: v.clone() for k, v in opt.state[p].items() if k in keys}


def _one_retreat(name: str, first_rho: float) -> tuple[Any, Tensor, Tensor, dict[str, Tensor], Tensor, float]:
    """Three agreeing steps, a fourth, then a gradient with ``rho = first_rho`` along it:
    returns the optimizer, the weights, ``w_{s-2}``, its base state, ``g_{s-1}`` and ``a_{s-1}``."""
    cls, _, kwargs = BASES[name]
    w = torch.linspace(-1.0, 1.0, 6, dtype=DTYPE).requires_grad_()
    opt = cls([w], horizon=0.0, **kwargs)
    for s in range(1, 4):  # three agreeing steps
        w.grad = _grad(s)
        opt.step()
    before = w.detach().clone()  # w_{s-2}
    state_before = _base_state(opt, w)
    g_last = _grad(4)
    w.grad = g_last.clone()
    opt.step()  # step s-1, at a_{s-1}
    a_last = _level0(opt)
    assert opt.retreats() == 0  # type: ignore[attr-defined]
    w.grad = first_rho * g_last  # the next gradient points back along the step, |rho| times as steep
    opt.step()
    assert opt.retreats() == 1  # type: ignore[attr-defined]
    return opt, w, before, state_before, g_last, a_last


@pytest.mark.parametrize("name", list(BASES))
def test_a_retreat_redoes_the_last_step_at_the_secant_step_size(name: str) -> None:
    """rho = -3 exactly: 1 / (1 - rho) = 1/4 (a secant factor of -1/rho would give 1/3).
    Reference: the torch.optim step from ``w_{s-2}`` at the new step size."""
    _, ref_cls, kwargs = BASES[name]
    opt, w, before, state_before, g_last, a_last = _one_retreat(name, -3.0)
    a_new = a_last / 4
    assert _level0(opt) == pytest.approx(a_new, rel=1e-14)
    redone = _torch_step_from(ref_cls, kwargs, before, state_before, g_last, a_new)
    torch.testing.assert_close(w.detach(), redone, rtol=1e-13, atol=1e-15)


@pytest.mark.parametrize("name", list(BASES))
def test_after_a_cut_clipped_at_the_smallest_factor_the_retried_step_is_taken_back_again(name: str) -> None:
    """rho = -1e5 asks for 1/(1 + 1e5); the cut stops at RETREAT_MIN_FACTOR = 1e-4, so the
    retried step still overshoots: its slope change (rho' = -30: 31 slopes) is what the first
    change predicts for a step 1e4 times shorter (1e5 + 1 slopes / 1e4), within 10x. Right after
    a retreat only rho < -10 takes the step back again, by 1/31 of the step size the redone
    step used. Reference: the torch.optim step from ``w_{s-2}``."""
    _, ref_cls, kwargs = BASES[name]
    opt, w, before, state_before, g_last, a_last = _one_retreat(name, -1e5)
    a_new = a_last * RETREAT_MIN_FACTOR
    assert _level0(opt) == pytest.approx(a_new, rel=1e-14)
    w.grad = -30.0 * g_last
    opt.step()
    assert opt.retreats() == 2  # type: ignore[attr-defined]
    a_again = a_new / 31
    assert _level0(opt) == pytest.approx(a_again, rel=1e-14)
    redone = _torch_step_from(ref_cls, kwargs, before, state_before, g_last, a_again)
    torch.testing.assert_close(w.detach(), redone, rtol=1e-13, atol=1e-15)


@pytest.mark.parametrize("name", ["adam", "adamw"])
def test_a_retried_step_whose_rise_the_curvature_cannot_explain_is_kept(name: str) -> None:
    """After the exact secant cut (rho = -3, 1/4) the retried step lands on the minimum of the
    quadratic through both slopes: its slope change should be a quarter of the first (one
    slope). rho' = -30 is a change of 31 slopes, more than 10x that: minibatch noise, which
    does not shrink with the step size (common practice: a quadratic's slope change is
    proportional to the step). The step is kept. (SGD's blow-up guard would take it back: its
    gradient is 30x larger.)"""
    opt, w, *_ = _one_retreat(name, -3.0)
    a_new = _level0(opt)
    w.grad = -30.0 * _grad(4)
    opt.step()
    assert opt.retreats() == 1  # type: ignore[attr-defined]
    assert _level0(opt) != pytest.approx(a_new / 31, rel=1e-3)


@pytest.mark.parametrize("name", ["sgd", "adam"])
@pytest.mark.parametrize("step", [WINDOW, WINDOW + 1])
def test_the_start_up_test_runs_in_the_first_ten_taken_steps_only(name: str, step: int) -> None:
    cls, _, kwargs = BASES[name]
    w = torch.zeros(6, dtype=DTYPE, requires_grad=True)
    opt = cls([w], **kwargs)
    g = _grad(0)
    for _ in range(1, step):
        w.grad = g.clone()
        opt.step()
    w.grad = -2.0 * g  # rho = -2: the loss rose along the last step (growth 2x: no guard)
    opt.step()
    assert opt.retreats() == (1 if step <= WINDOW else 0)  # type: ignore[attr-defined]


@pytest.mark.parametrize("name", ["sgd", "adam"])
def test_a_retreat_starts_the_trail_of_updates_afresh(name: str) -> None:
    # With a trail (horizon > 0), level 1's hypergradient is -<g, D>/(1 - horizon) against the
    # trail D of past updates; a retreat empties it (it held the unstable steps), so the first
    # step after it has nothing to measure against: its hypergradient is exactly 0.
    cls, _, kwargs = BASES[name]
    w = torch.zeros(6, dtype=DTYPE, requires_grad=True)
    opt = cls([w], horizon=0.9, **kwargs)
    for s in range(1, 4):
        w.grad = _grad(s)
        opt.step()
    assert opt.param_groups[0]["tower"]["hypergrad"][0, 0] != 0
    w.grad = -3.0 * _grad(3)
    opt.step()
    assert opt.retreats() == 1  # type: ignore[attr-defined]
    w.grad = _grad(3)
    opt.step()
    assert opt.retreats() == 1  # type: ignore[attr-defined]
    assert opt.param_groups[0]["tower"]["hypergrad"][0, 0] == 0.0


@pytest.mark.xfail(
    strict=True,
    raises=AssertionError,
    reason="recorded defect (found by the property tests): the growth guard compares each gradient with "
    "the largest of the taken steps and a retreat does not update it, so after a first gradient 1e3 x "
    "smaller than the next ones every step retreats by the 1e-4 minimum factor: 30 retreats in 30 steps, "
    "a_0 = 1.6e-103, weights frozen; the retreat also ignores the ±69 log bound (u_0 = -276 after a 1e-12 "
    "first gradient)",
)
def test_a_small_first_gradient_does_not_lock_the_growth_guard() -> None:
    # reference: torch.optim.SGD at the same lr takes every step; the guard is for divergence
    gen = torch.Generator().manual_seed(0)
    w = torch.randn(6, generator=gen, dtype=DTYPE, requires_grad=True)
    opt = TowerSGD([w], lr=0.1)
    w.grad = 1e-3 * torch.randn(6, generator=gen, dtype=DTYPE)
    opt.step()
    for _ in range(30):
        w.grad = w.detach() - 1.0  # 0.5 |w - 1|^2: fixed SGD at 0.1 converges
        opt.step()
    assert opt.retreats() <= 2
    assert _level0(opt) >= 1e-4 * 0.1
    assert abs(float(opt.param_groups[0]["tower"]["log_step"][0, 0])) <= LOG_STEP_BOUND


# ---------------------------------------------------------------------------- bounds


#: An "adam" level with betas 0 and eps 0 moves by exactly its step size times sign(ĥ): 5, clipped.
SIGN_LEVEL = Level("adam", lr=5.0, betas=(0.0, 0.0), eps=0.0)


def _sign_level_run(granularity: str, n_tensors: int, sign: int, steps: int, lr: float) -> TowerSGD:
    """Plain SGD under one level whose every move hits the clip."""
    ws = [torch.zeros(3, dtype=DTYPE, requires_grad=True) for _ in range(n_tensors)]
    opt = TowerSGD(ws, lr=lr, levels=[SIGN_LEVEL], retreat=False, horizon=0.0, granularity=granularity)
    for s in range(steps):
        for w in ws:
            w.grad = torch.ones(3, dtype=DTYPE) * (sign**s)
        opt.step()
    return opt


# 1 tensor: the levels run as Python floats; 9 per-tensor step sizes: as tensor operations.
PATHS = [("group", 1), ("tensor", 9)]


@pytest.mark.parametrize(("granularity", "n_tensors"), PATHS, ids=["host", "tensor_ops"])
def test_a_level_moves_the_log_step_size_by_at_most_one_per_step(granularity: str, n_tensors: int) -> None:
    # Agreeing gradients: h_1 = -a_0 <g, g> < 0 and level 1 grows log a_0 by clip(5, 1) = 1.
    for steps in (2, 3):
        opt = _sign_level_run(granularity, n_tensors, sign=1, steps=steps, lr=1e-3)
        sizes = opt.step_size_tensors()[0][:, 0]
        expected = torch.full_like(sizes, 1e-3 * math.exp(MAX_LOG_CHANGE * (steps - 1)))
        torch.testing.assert_close(sizes, expected, rtol=1e-14, atol=0)


@pytest.mark.parametrize(("granularity", "n_tensors"), PATHS, ids=["host", "tensor_ops"])
@pytest.mark.parametrize("sign", [1, -1], ids=["growing", "shrinking"])
def test_log_step_sizes_stop_at_the_bound(granularity: str, n_tensors: int, sign: int) -> None:
    # Agreeing gradients grow log a_0 by 1 per step, sign-flipping ones shrink it by 1, up to ±69.
    opt = _sign_level_run(granularity, n_tensors, sign=sign, steps=int(LOG_STEP_BOUND) + 6, lr=1e-40)
    sizes = opt.step_size_tensors()[0][:, 0]
    torch.testing.assert_close(
        sizes.div(1e-40).log(), torch.full_like(sizes, sign * LOG_STEP_BOUND), rtol=1e-15, atol=0
    )


# ---------------------------------------------------------------------------- growth search


@pytest.mark.parametrize(("granularity", "n_tensors"), PATHS, ids=["host", "tensor_ops"])
def test_growth_search_boosts_level_ones_move_by_1_1_to_the_steps_searched_before(
    granularity: str, n_tensors: int
) -> None:
    # Reference for level 1's own move c_s: torch.optim.Adam on the scalar log step size with
    # gradient ĥ_1 (level 1 is an "adam" level of fixed step 0.05). While searching, the move is
    # min(c, max(1.1^n c, -c_max)) for growth (c < 0), n = 0, 1, 2, ... the steps searched before.
    ws = [torch.zeros(3, dtype=DTYPE, requires_grad=True) for _ in range(n_tensors)]
    level = Level("adam", lr=0.05)
    opt = TowerSGD(ws, lr=1e-6, levels=[level], growth_search=1.0, horizon=0.0, granularity=granularity)
    shadow = torch.zeros(n_tensors, dtype=DTYPE, requires_grad=True)
    ref = torch.optim.Adam([shadow], lr=level.lr, betas=level.betas, eps=level.eps, foreach=False)
    u_before = torch.zeros(n_tensors, dtype=DTYPE)
    for s in range(8):
        for w in ws:
            w.grad = w.detach() - 1.0  # 0.5 |w - 1|^2 from 0: barely moves at 1e-6
        opt.step()
        tower = opt.param_groups[0]["tower"]
        if s == 0:
            u_before = tower["log_step"][:, 0].clone()
            continue  # nothing to learn from on the first step
        assert (tower["search"] > 0).all()  # still searching
        shadow.grad = tower["hypergrad"][:, 0].clone()
        start = shadow.detach().clone()
        ref.step()
        c = start - shadow.detach()  # level 1's own move on u_0
        assert (c < 0).all()
        boost = SPEEDUP ** (s - 1)
        expected = u_before - torch.minimum(c, (boost * c).clamp_min(-1.0))
        torch.testing.assert_close(tower["log_step"][:, 0], expected, rtol=1e-14, atol=0)
        u_before = tower["log_step"][:, 0].clone()


# ---------------------------------------------------------------------------- learned momentum


def test_learned_momentum_logit_moves_like_torch_adam_with_its_hypergradient() -> None:
    # Reference: torch.optim.Adam on the scalar logit z (mu = sigmoid(z)) with gradient the stored
    # hypergradient of z; bias corrections 1 - beta^t counted from the first nonzero-state update.
    gen = torch.Generator().manual_seed(0)
    w = torch.randn(6, generator=gen, dtype=DTYPE, requires_grad=True)
    hyper = Level("adam", lr=0.01, eps=1e-30)
    opt = TowerSGD([w], lr=0.05, momentum=0.5, learn_momentum=True, hyper_level=hyper, retreat=False)
    z = torch.tensor([0.0], dtype=DTYPE, requires_grad=True)  # logit(0.5)
    ref = torch.optim.Adam([z], lr=hyper.lr, betas=hyper.betas, eps=hyper.eps, foreach=False)
    target = torch.linspace(-1.0, 2.0, 6, dtype=DTYPE)
    moved = []
    for s in range(8):
        w.grad = (w.detach() - target) * torch.linspace(0.5, 3.0, 6, dtype=DTYPE)
        opt.step()
        if s == 0:
            continue  # the first step only records a tangent
        z.grad = opt.param_groups[0]["tower"]["hyper_grad"].clone()
        ref.step()
        assert opt.hyperparameters()[0]["momentum"] == pytest.approx(float(torch.sigmoid(z.detach())), rel=1e-14, abs=0)
        moved.append(float(z.grad))
    assert any(abs(h) > 1e-6 for h in moved)  # a real update, not zeros
