"""Every level's hypergradient against references outside the optimizer.

The one-step-back rule: the ``ĥ_k`` computed at step ``s`` is the derivative of the loss
``L_s(w_{s-1})`` with respect to ``u_{k-1,s-1}``, the log of the step size used at step
``s-1``, holding everything from before step ``s-1`` constant (``w_{s-2}``, the base's
moments, and the level directions ``d_{j,s-1}``). The references:

* autograd through step ``s-1`` rebuilt in differentiable torch ops, with the base
  direction recomputed here from the published SGD / Adam recurrences;
* forward-mode AD (``torch.autograd.forward_ad``) through the same rebuilt step;
* central finite differences through the optimizer's real step ``s-1``, run from a
  snapshot whose ``log_step`` entry is perturbed.

Plus the sign of the hypergradient (Baydin et al., ICLR 2018), the SGD-HD closed form in
log space, and the level updates against ``torch.optim`` applied to the scalar log step.
"""

from __future__ import annotations

import copy
import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import pytest
import tiny_net
import torch
from torch import Tensor
from torch.autograd import forward_ad as fwAD

from stepsize_tower import Level, TowerAdam, TowerAdamW, TowerSGD

DTYPE = torch.float64
N_IN, N_HIDDEN, N_OUT, BATCH = 4, 6, 2, 8


def _init_params(seed: int = 0) -> list[Tensor]:
    return tiny_net.init_params(N_IN, N_HIDDEN, N_OUT, seed)


def _batches(n: int, seed: int = 1) -> list[tuple[Tensor, Tensor]]:
    return tiny_net.batches(n, N_IN, N_OUT, BATCH, seed)


_data_loss = tiny_net.mse_loss


# ----------------------------------------------------------------------------- bases


@dataclass(frozen=True)
class Base:
    name: str
    cls: type
    kwargs: dict[str, Any]

    @property
    def l2(self) -> float:
        """Coupled (L2) weight decay is part of the minimized loss; AdamW's decay is not."""
        return 0.0 if self.cls is TowerAdamW else self.kwargs.get("weight_decay", 0.0)

    def objective(self, ws: list[Tensor], batch: tuple[Tensor, Tensor]) -> Tensor:
        loss = _data_loss(ws, batch)
        if self.l2:
            loss = loss + 0.5 * self.l2 * sum((w * w).sum() for w in ws)
        return loss

    def directions(self, grads: list[list[Tensor]], weights: list[list[Tensor]]) -> list[Tensor]:
        """``d_{0,r}`` per tensor after ``r = len(grads)`` steps, from the published recurrences.

        ``grads[t]`` is the data-loss gradient and ``weights[t]`` the weights it was taken at.
        """
        kw = self.kwargs
        wd = kw.get("weight_decay", 0.0)
        out = []
        for i in range(len(grads[0])):
            if self.cls is TowerSGD:
                # reference: torch.optim.SGD's documented algorithm (PyTorch docs)
                mu, damp = kw.get("momentum", 0.0), kw.get("dampening", 0.0)
                buf = None
                for g_raw, w in zip(grads, weights, strict=True):
                    g = g_raw[i] + wd * w[i]
                    buf = g.clone() if buf is None else mu * buf + (1 - damp) * g
                if mu == 0:
                    out.append(g)
                else:
                    out.append(g + mu * buf if kw.get("nesterov") else buf)
            else:
                # reference: Kingma & Ba, ICLR 2015 (Adam); Loshchilov & Hutter, ICLR 2019 (AdamW)
                beta1, beta2 = kw.get("betas", (0.9, 0.999))
                eps = kw.get("eps", 1e-8)
                decoupled = self.cls is TowerAdamW
                m = torch.zeros_like(grads[0][i])
                v = torch.zeros_like(m)
                for g_raw, w in zip(grads, weights, strict=True):
                    g = g_raw[i] if decoupled else g_raw[i] + wd * w[i]
                    m = beta1 * m + (1 - beta1) * g
                    v = beta2 * v + (1 - beta2) * g * g
                r = len(grads)
                d = (m / (1 - beta1**r)) / ((v / (1 - beta2**r)).sqrt() + eps)
                out.append(d + wd * weights[-1][i] if decoupled else d)
        return out


BASES = [
    Base("sgd", TowerSGD, {"lr": 0.3}),
    Base("sgd_momentum", TowerSGD, {"lr": 0.1, "momentum": 0.8, "dampening": 0.1}),
    Base("sgd_nesterov", TowerSGD, {"lr": 0.1, "momentum": 0.8, "nesterov": True}),
    # L2 decay enters the probe gradient and, for plain SGD and Nesterov, the stored previous gradient
    Base("sgd_l2", TowerSGD, {"lr": 0.3, "weight_decay": 0.1}),
    Base("sgd_nesterov_l2", TowerSGD, {"lr": 0.1, "momentum": 0.8, "nesterov": True, "weight_decay": 0.1}),
    Base("adam", TowerAdam, {"lr": 0.03, "betas": (0.8, 0.99)}),
    Base("adam_l2", TowerAdam, {"lr": 0.03, "weight_decay": 0.1}),
    Base("adamw", TowerAdamW, {"lr": 0.03, "weight_decay": 0.2}),
]

LEVEL_STACKS = {
    "adam": [Level("adam", lr=0.1)],
    "sgd": [Level("sgd", lr=0.5)],
    "adam-sgd": [Level("adam", lr=0.1), Level("sgd", lr=0.5)],
    "sgd-adam": [Level("sgd", lr=0.5), Level("adam", lr=0.1)],
    "adam-sgd-adam": [Level("adam", lr=0.1), Level("sgd", lr=0.5), Level("adam", lr=0.1)],
    "sgd-adam-sgd": [Level("sgd", lr=0.5), Level("adam", lr=0.2), Level("sgd", lr=0.5)],
}


# ----------------------------------------------------------------------------- a recorded run


@dataclass
class Record:
    """What one step ``t`` saw: weights ``w_{t-1}``, data gradient, snapshot before, tower after."""

    weights: list[Tensor]
    grads: list[Tensor]
    state_before: dict[str, Any] | None
    tower_after: dict[str, Tensor]


def _run(base: Base, levels: list[Level], steps: int) -> tuple[Callable[[Any], Any], list[Tensor], list[Record]]:
    def make(params: Any) -> Any:
        return base.cls(params, levels=levels, retreat=False, horizon=0, **base.kwargs)

    batches = _batches(steps + 1)
    params = _init_params()
    opt = make(params)
    records = [Record([], [], None, {})]  # index 0 unused: steps count from 1
    for t in range(1, steps + 1):
        state_before = copy.deepcopy(opt.state_dict())
        weights = [p.detach().clone() for p in params]
        opt.zero_grad()
        _data_loss(params, batches[t]).backward()
        grads = [p.grad.detach().clone() for p in params]
        opt.step()
        tower = {k: v.clone() for k, v in opt.param_groups[0]["tower"].items()}
        records.append(Record(weights, grads, state_before, tower))
    assert opt.retreats() == 0 and opt.skipped_steps() == 0
    return make, batches, records


class UnrolledStep:
    """Step ``r`` of the optimizer rebuilt in differentiable torch ops (group granularity)."""

    def __init__(self, base: Base, levels: list[Level], records: list[Record], r: int) -> None:
        self.base, self.levels = base, levels
        self.lr = base.kwargs["lr"]
        self.w_prev = records[r].weights  # w_{r-1}
        self.d0 = base.directions(
            [rec.grads for rec in records[1 : r + 1]], [rec.weights for rec in records[1 : r + 1]]
        )
        # u_{k,r-1}: the log step sizes before step r (the state an optimizer publishes).
        self.u_prev = [float(x) for x in records[r - 1].tower_after["log_step"][0]]
        # d_{k,r} for levels k = 1..D: the level directions of step r (held constant).
        self.dirs = [float(x) for x in records[r].tower_after["prev_dir"][0]]

    def descend(self, level: int, a: Any) -> Any:
        """From ``a_{level,r}`` down to ``a_{0,r}``: ``u_{i-1,r} = u_{i-1,r-1} - a_{i,r} d_{i,r}``."""
        for i in range(level, 0, -1):
            a = torch.exp(self.u_prev[i - 1] - a * self.dirs[i - 1])
            if i == 1:
                a = self.lr * a
        return a

    def step_size(self, level: int) -> float:
        """``a_{level,r}``, from the fixed top step size down."""
        a = torch.tensor(self.levels[-1].lr, dtype=DTYPE)
        for i in range(len(self.levels), level, -1):
            a = torch.exp(self.u_prev[i - 1] - a * self.dirs[i - 1])
            if i == 1:
                a = self.lr * a
        return float(a)

    def weights(self, level: int, a: Any) -> list[Tensor]:
        """``w_r = w_{r-1} - a_{0,r} d_{0,r}`` as a function of ``a_{level,r}``."""
        a0 = self.descend(level, a)
        return [w - a0 * d for w, d in zip(self.w_prev, self.d0, strict=True)]


# ----------------------------------------------------------------------------- hypergradient == references

CASES = [(b, stack) for b in BASES for stack in LEVEL_STACKS]

#: Asserted relative agreement of every hypergradient with autograd and forward-mode AD: measured
#: at most 4.6e-15 over all cases below (float64). Dropping Adam's eps from the probe direction
#: moves it by ~1e-7, a missing L2 term by far more: both fail.
AUTODIFF_REL = 5e-14
#: ... and with the 5-point finite difference (h = 1e-3 in log step size): measured at most 1.1e-6
#: (plain SGD with L2 decay; 3.5e-7 without), truncation error; h = 1e-4 is worse (rounding, 3.8e-5).
FINITE_DIFFERENCE_REL = 3e-6
CHECK_STEPS = (5, 6, 7)  # ĥ_3 at step s is nonzero from s = 5 on (each level starts one step later)


@pytest.mark.filterwarnings("ignore:`torch.jit.script` is deprecated:DeprecationWarning")  # torch's forward-AD setup
@pytest.mark.parametrize(("base", "stack"), CASES, ids=[f"{b.name}-{s}" for b, s in CASES])
def test_hypergradient_of_every_level_matches_autograd_forward_ad_and_finite_differences(
    base: Base, stack: str
) -> None:
    levels = LEVEL_STACKS[stack]
    depth = len(levels)
    make, batches, records = _run(base, levels, steps=max(CHECK_STEPS))
    for s in CHECK_STEPS:
        r = s - 1
        unrolled = UnrolledStep(base, levels, records, r)
        got = records[s].tower_after["hypergrad"][0]

        # The rebuilt step reproduces the real one (so the references differentiate the right thing).
        for k in range(depth):
            assert math.isclose(unrolled.step_size(k), float(records[r].tower_after["prev_step"][0, k]), rel_tol=1e-14)
        rebuilt = unrolled.weights(0, unrolled.step_size(0))
        for w_rebuilt, w_real in zip(rebuilt, records[s].weights, strict=True):
            torch.testing.assert_close(w_rebuilt, w_real, rtol=0, atol=1e-14)

        for k in range(depth):  # ĥ_{k+1} = dL_s / du_{k,r}
            a_k = unrolled.step_size(k)
            h_opt = float(got[k])
            assert abs(h_opt) > 1e-9, f"ĥ_{k + 1} at step {s} is ~0; the check would be vacuous"

            # reference: autograd through an unrolled step (leaf: the step size a_k; dL/du = a dL/da)
            leaf = torch.tensor(a_k, dtype=DTYPE, requires_grad=True)
            (dl_da,) = torch.autograd.grad(base.objective(unrolled.weights(k, leaf), batches[s]), leaf)
            h_autograd = a_k * float(dl_da)
            assert math.isclose(h_opt, h_autograd, rel_tol=AUTODIFF_REL), (k + 1, s, h_opt, h_autograd)

            # reference: torch.autograd.forward_ad (tangent 1 on a_k)
            with fwAD.dual_level():
                dual = fwAD.make_dual(torch.tensor(a_k, dtype=DTYPE), torch.tensor(1.0, dtype=DTYPE))
                loss = base.objective(unrolled.weights(k, dual), batches[s])
                h_forward = a_k * float(fwAD.unpack_dual(loss).tangent)
            assert math.isclose(h_opt, h_forward, rel_tol=AUTODIFF_REL), (k + 1, s, h_opt, h_forward)

            # reference: central finite differences through the optimizer's real step r
            h_fd = _finite_difference(make, base, batches, records[r], k, s)
            assert math.isclose(h_opt, h_fd, rel_tol=FINITE_DIFFERENCE_REL), (k + 1, s, h_opt, h_fd)


def _finite_difference(make: Callable[[Any], Any], base: Base, batches: list, rec: Record, k: int, s: int) -> float:
    """dL_s/du_{k,s-1} by a 5-point central stencil on ``log_step[0, k]`` before step ``s-1``.

    Shifting ``u_{k,s-2}`` by ``δ`` before the step shifts ``u_{k,s-1}`` by exactly ``δ``: the
    level directions of that step are built from the previous step's stored values only.
    """

    def loss_after_step(delta: float) -> float:
        params = [w.clone().requires_grad_() for w in rec.weights]
        opt = make(params)
        opt.load_state_dict(copy.deepcopy(rec.state_before))
        opt.param_groups[0]["tower"]["log_step"][0, k] += delta
        opt.zero_grad()
        _data_loss(params, batches[s - 1]).backward()
        opt.step()
        with torch.no_grad():
            return float(base.objective(params, batches[s]))

    h = 1e-3
    return (-loss_after_step(2 * h) + 8 * loss_after_step(h) - 8 * loss_after_step(-h) + loss_after_step(-2 * h)) / (
        12 * h
    )


# ----------------------------------------------------------------------------- sign (Baydin et al. 2018)


def _scalar_run(make: Callable[[Any], Any], loss_fn: Callable[[Tensor], Tensor], w0: Tensor, steps: int):
    w = w0.clone().requires_grad_()
    opt = make([w])
    start = opt.step_sizes()[0][0]
    for _ in range(steps):
        opt.zero_grad()
        loss_fn(w).backward()
        opt.step()
    return start, opt


W0 = torch.tensor([1.0, -2.0, 0.5], dtype=DTYPE)
SLOPE = torch.tensor([0.3, -0.2, 0.5], dtype=DTYPE)

AGREEING = [
    ("sgd_linear_slope", lambda p: TowerSGD(p, lr=1e-3, horizon=0), lambda w: (SLOPE * w).sum()),
    ("sgd_momentum_linear_slope", lambda p: TowerSGD(p, lr=1e-3, momentum=0.9, horizon=0), lambda w: (SLOPE * w).sum()),
    ("adam_linear_slope", lambda p: TowerAdam(p, lr=1e-3, horizon=0), lambda w: (SLOPE * w).sum()),
    # kind "sgd" moves log a_0 by a_1 * |ĥ_1| (scale-dependent): a_1 sized for |ĥ_1| ~ 5e-4
    (
        "sgd_quadratic_tiny_lr",
        lambda p: TowerSGD(p, lr=1e-4, levels=[Level("sgd", lr=100.0)], horizon=0),
        lambda w: 0.5 * (w * w).sum(),
    ),
    ("adam_quadratic_tiny_lr", lambda p: TowerAdam(p, lr=1e-4, depth=2, horizon=0), lambda w: 0.5 * (w * w).sum()),
]


@pytest.mark.parametrize(("name", "make", "loss_fn"), AGREEING, ids=[c[0] for c in AGREEING])
def test_step_size_grows_while_consecutive_gradients_agree(name: str, make: Callable, loss_fn: Callable) -> None:
    # Baydin et al., ICLR 2018, sign of the hypergradient: <g_s, d_{s-1}> > 0 -> h < 0 -> a_0 grows
    start, opt = _scalar_run(make, loss_fn, W0, steps=20)
    assert float(opt.param_groups[0]["tower"]["hypergrad"][0, 0]) < 0
    assert opt.step_sizes()[0][0] > 1.2 * start


# Quadratic 0.5 * L * |w|^2 with L = 1: a step size above 1/L overshoots the minimum, so
# consecutive gradients point in opposite directions (common practice: the 2/L stability bound).
OPPOSING = [
    ("sgd_adam_level", lambda p: TowerSGD(p, lr=1.5, retreat=False, horizon=0)),
    ("sgd_sgd_level", lambda p: TowerSGD(p, lr=1.5, retreat=False, horizon=0, levels=[Level("sgd", lr=0.1)])),
    ("sgd_depth2", lambda p: TowerSGD(p, lr=1.5, retreat=False, horizon=0, depth=2)),
    # the first-step limit off too: it would start below the overshoot (0.1 x |w0|)
    ("adam_overshooting", lambda p: TowerAdam(p, lr=3.0, retreat=False, horizon=0, first_step_limit=None)),
]


@pytest.mark.parametrize(("name", "make"), OPPOSING, ids=[c[0] for c in OPPOSING])
def test_step_size_shrinks_while_consecutive_gradients_oppose(name: str, make: Callable) -> None:
    # Baydin et al., ICLR 2018, sign of the hypergradient: <g_s, d_{s-1}> < 0 -> h > 0 -> a_0 shrinks
    start, opt = _scalar_run(make, lambda w: 0.5 * (w * w).sum(), W0, steps=4)
    assert float(opt.param_groups[0]["tower"]["hypergrad"][0, 0]) > 0
    assert opt.step_sizes()[0][0] < 0.95 * start


# ----------------------------------------------------------------------------- closed forms


def test_sgd_level_on_sgd_base_follows_the_sgd_hd_update_in_log_space() -> None:
    # reference: Baydin et al., ICLR 2018, SGD-HD: h = -<g_s, g_{s-1}> (d/da), in log space
    # u_0 <- u_0 - a_1 * ĥ_1 with ĥ_1 = -a_{0,s-1} <g_s, g_{s-1}>, then w_s = w_{s-1} - a_{0,s} g_s
    a1 = 0.3
    params = _init_params()
    opt = TowerSGD(params, lr=0.2, levels=[Level("sgd", lr=a1)], retreat=False, horizon=0)
    batches = _batches(8)
    prev_grads: list[Tensor] | None = None
    for t in range(1, 8):
        a_prev = opt.step_sizes()[0][0]
        w_prev = [p.detach().clone() for p in params]
        opt.zero_grad()
        _data_loss(params, batches[t]).backward()
        grads = [p.grad.detach().clone() for p in params]
        opt.step()
        a_now = opt.step_sizes()[0][0]
        if prev_grads is None:
            assert a_now == a_prev  # nothing to learn from on the first step
        else:
            h1 = -a_prev * sum(float((g * gp).sum()) for g, gp in zip(grads, prev_grads, strict=True))
            assert math.isclose(float(opt.param_groups[0]["tower"]["hypergrad"][0, 0]), h1, rel_tol=1e-14)
            expected = math.exp(math.log(a_prev) - a1 * h1)
            assert math.isclose(a_now, expected, rel_tol=1e-12), (t, a_now, expected)
            assert abs(math.log(a_now / a_prev)) > 1e-4, "the step size did not move; vacuous check"
        for p, w, g in zip(params, w_prev, grads, strict=True):
            torch.testing.assert_close(p.detach(), w - a_now * g, rtol=0, atol=1e-14)
        prev_grads = grads


@pytest.mark.parametrize("stack", ["adam", "sgd", "adam-sgd", "sgd-adam", "adam-sgd-adam"])
def test_levels_update_log_step_like_torch_optim_on_a_scalar(stack: str) -> None:
    # reference: torch.optim.Adam / torch.optim.SGD applied to the scalar u_{k-1} with gradient ĥ_k,
    # top-down, level k's step size being a_k = exp(u_k) just produced by level k+1
    levels = LEVEL_STACKS[stack]
    depth = len(levels)
    base = BASES[1]
    _, _, records = _run(base, levels, steps=10)
    us = [
        torch.tensor(float(records[1].tower_after["log_step"][0, k]), dtype=DTYPE, requires_grad=True)
        for k in range(depth)
    ]
    ref_opts = []
    for k, lv in enumerate(levels):
        if lv.kind == "adam":
            ref_opts.append(torch.optim.Adam([us[k]], lr=1.0, betas=lv.betas, eps=lv.eps, foreach=False))
        else:
            ref_opts.append(torch.optim.SGD([us[k]], lr=1.0, foreach=False))
    for s in range(2, 11):
        hyper = records[s].tower_after["hypergrad"][0]
        step_k = levels[-1].lr
        for k in range(depth, 0, -1):  # level k moves u_{k-1}
            group = ref_opts[k - 1].param_groups[0]
            group["lr"] = step_k
            us[k - 1].grad = hyper[k - 1].clone()
            ref_opts[k - 1].step()
            step_k = float(us[k - 1].detach().exp())
        for k in range(depth):
            got = float(records[s].tower_after["log_step"][0, k])
            assert math.isclose(got, float(us[k].detach()), rel_tol=1e-12, abs_tol=1e-12), (
                s,
                k,
                got,
                float(us[k].detach()),
            )
    moved = abs(float(records[10].tower_after["log_step"][0, 0]) - float(records[1].tower_after["log_step"][0, 0]))
    assert moved > 1e-3
