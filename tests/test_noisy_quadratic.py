"""The learned step size on the noisy quadratic model, against its closed-form optimum.

Reference: the noisy quadratic model (Zhang et al., "Which algorithmic choices matter at
which batch sizes? Insights from a noisy quadratic model", NeurIPS 2019). For SGD on
``L(w) = ½ Σ h_i w_i²`` with gradient noise of variance ``c·h_i`` per coordinate, each
coordinate's second moment follows ``E[w_i²]_{t+1} = (1 - a h_i)² E[w_i²]_t + a² c h_i``, so
the expected loss after ``T`` steps at a fixed step size ``a`` is a closed form and the best
fixed ``a*`` for the budget is found by a scalar minimization (SciPy). A learned step size
typed 1000x too small or too large must end near that optimum's expected loss and must not
collapse far below ``a*`` (the short-horizon bias of greedy hypergradients under noise).
"""

from __future__ import annotations

import functools
from collections.abc import Callable

import numpy as np
import pytest
import torch
from scipy.optimize import minimize_scalar

from stepsize_tower import TowerAdam, TowerSGD

DIM = 100
CURVATURES = np.logspace(-3, 0, DIM)
STEPS = 1000
SEEDS = 4


def expected_loss(a: float, noise: float, steps: int = STEPS) -> float:
    """``E[L_T]`` for fixed-step SGD from ``w_0 = 1`` (closed form of the recursion above)."""
    h = CURVATURES
    r = (1.0 - a * h) ** 2
    r_t = r**steps
    one_minus_r = 1.0 - r
    safe = np.abs(one_minus_r) > 1e-15
    geometric = np.where(safe, (1.0 - r_t) / np.where(safe, one_minus_r, 1.0), float(steps))
    return float(0.5 * np.sum(h * (r_t + a * a * noise * h * geometric)))


def minimize_step(loss: Callable[[float], float], bounds: tuple[float, float], xatol: float) -> tuple[float, float]:
    """``(a, loss(a))`` at the minimum of ``log loss(a)`` over ``log a`` in ``bounds`` (bounded scalar search)."""
    res = minimize_scalar(
        lambda log_a: np.log(loss(float(np.exp(log_a)))),
        bounds=(np.log(bounds[0]), np.log(bounds[1])),
        method="bounded",
        options={"xatol": xatol},
    )
    a = float(np.exp(res.x))
    return a, loss(a)


def best_fixed_step(noise: float) -> tuple[float, float]:
    """``(a*, E[L_T](a*))``: the best fixed step size for the budget, by bounded scalar search."""
    return minimize_step(lambda a: expected_loss(a, noise), (1e-5, 1.999), 1e-6)


def run_noisy(
    make: Callable[..., torch.optim.Optimizer],
    lr: float,
    noise: float,
    seed: int,
    factor: Callable[[int], float] | None = None,
) -> tuple[float, float]:
    """Final loss and final step size of ``make([w], lr=lr)`` on one noisy run (its own defaults otherwise).

    ``factor``: a ``LambdaLR`` factor of the step, stepped after every optimizer step (None: no schedule).
    """
    gen = torch.Generator().manual_seed(seed)
    h = torch.tensor(CURVATURES)
    w = torch.nn.Parameter(torch.ones(DIM, dtype=torch.float64))
    opt = make([w], lr=lr)
    sched = torch.optim.lr_scheduler.LambdaLR(opt, factor) if factor is not None else None
    for _ in range(STEPS):
        w.grad = h * w.detach() + torch.randn(DIM, generator=gen, dtype=torch.float64) * (noise * h).sqrt()
        opt.step()
        if sched is not None:
            sched.step()
    final_step = opt.step_sizes()[0][0] if hasattr(opt, "step_sizes") else lr
    return float(0.5 * (h * w.detach() ** 2).sum()), final_step


def train(lr: float, noise: float, seed: int) -> tuple[float, float]:
    """Final loss and final learned step size of TowerSGD (defaults) on one noisy run."""
    return run_noisy(TowerSGD, lr, noise, seed)


def test_closed_form_matches_simulated_fixed_step_sgd() -> None:
    # The reference itself, checked by simulation (common practice): 200 runs of plain SGD.
    noise, a = 0.1, 0.05
    gen = torch.Generator().manual_seed(0)
    h = torch.tensor(CURVATURES)
    w = torch.ones(200, DIM, dtype=torch.float64)
    for _ in range(STEPS):
        w -= a * (h * w + torch.randn(w.shape, generator=gen, dtype=torch.float64) * (noise * h).sqrt())
    simulated = float((0.5 * (h * w**2).sum(dim=1)).mean())
    assert simulated == pytest.approx(expected_loss(a, noise), rel=0.05)


@pytest.mark.parametrize("noise", [pytest.param(0.01, marks=pytest.mark.slow), 1.0])
@pytest.mark.parametrize("typed", [1e-3, 1e3], ids=["1000x_too_small", "1000x_too_large"])
def test_learned_step_size_ends_near_the_best_fixed_step_for_the_budget(noise: float, typed: float) -> None:
    a_star, loss_star = best_fixed_step(noise)
    runs = [train(a_star * typed, noise, seed) for seed in range(SEEDS)]
    mean_loss = float(np.mean([loss for loss, _ in runs]))
    # Measured (6 seeds): 0.49-0.69 x the optimum's expected loss (a learned step size may anneal, which
    # a fixed one cannot); a collapse to a*/10 would give 5-7x.
    assert mean_loss <= 1.5 * loss_star
    final_steps = [a for _, a in runs]
    assert min(final_steps) >= a_star / 10, f"step size collapsed: {min(final_steps):.3g} vs a* = {a_star:.3g}"


# ---------------------------------------------------------------- Adam on the same model
# Adam has no closed form here, so its reference is torch.optim.Adam itself: the best fixed
# rate of a grid (quarter decades), by the mean final loss over the same seeds and noise.

ADAM_NOISE = 1.0
ADAM_GRID = tuple(10.0 ** (k / 4) for k in range(-11, -4))  # 1.8e-3 ... 0.056


def train_adam(make: Callable[..., torch.optim.Optimizer], lr: float, seed: int) -> tuple[float, float]:
    """:func:`run_noisy` at :data:`ADAM_NOISE`."""
    return run_noisy(make, lr, ADAM_NOISE, seed)


@functools.lru_cache(maxsize=1)
def best_fixed_adam() -> tuple[float, float]:
    """``(lr*, mean final loss at lr*)`` of torch.optim.Adam over :data:`ADAM_GRID` (an inner grid point)."""
    means = {lr: float(np.mean([train_adam(torch.optim.Adam, lr, s)[0] for s in range(SEEDS)])) for lr in ADAM_GRID}
    best = min(means, key=means.__getitem__)
    assert ADAM_GRID[0] < best < ADAM_GRID[-1], "the grid must bracket the best fixed rate"
    return best, means[best]


# Typed 1000x too small the tower overshoots to ~6x lr* by step 150; before the trail forgot
# steps taken at far larger rates (trail.forget_larger_steps) it then collapsed to ~1e-5 lr*
# (6.4x the best fixed loss); measured now: 1.17x, final step size 0.82 lr* (seed mean / min).
@pytest.mark.parametrize(
    "typed",
    [1e-3, 1e3],
    ids=["1000x_too_small", "1000x_too_large"],
)
def test_tower_adam_ends_near_the_best_fixed_adam_on_the_noisy_quadratic(typed: float) -> None:
    lr_star, loss_star = best_fixed_adam()
    runs = [train_adam(TowerAdam, lr_star * typed, seed) for seed in range(SEEDS)]
    mean_loss = float(np.mean([loss for loss, _ in runs]))
    assert mean_loss <= 1.5 * loss_star, f"mean loss {mean_loss:.3g} vs best fixed Adam {loss_star:.3g}"
    assert min(a for _, a in runs) >= lr_star / 10, f"step size collapsed below lr*/10 = {lr_star / 10:.3g}"


# ---------------------------------------------------------------- SGD with momentum (heavy ball)
# The same model has an exact second-moment recursion for heavy ball (Zhang et al. 2019 treat
# momentum in the noisy quadratic model): per coordinate the state s = (w, b) moves by
# b' = μ b + h w + ξ, w' = w - a b', i.e. s' = A s + c ξ with A = [[1 - a h, -a μ], [h, μ]],
# c = (-a, 1), so E[s s^T]' = A E[s s^T] A^T + noise · h · c c^T, from w_0 = 1, b_0 = 0.

MOMENTUM = 0.9


def expected_loss_heavy_ball(a: float, noise: float, steps: int = STEPS) -> float:
    """``E[L_T]`` for fixed-step heavy ball (torch.optim.SGD's momentum) from ``w_0 = 1`` (exact recursion)."""
    h, mu = CURVATURES, MOMENTUM
    ww, wb, bb = np.ones_like(h), np.zeros_like(h), np.zeros_like(h)
    a11, a12, a21, a22, c1 = 1.0 - a * h, -a * mu, h, mu, -a
    q = noise * h
    for _ in range(steps):
        ww, wb, bb = (
            a11 * a11 * ww + 2 * a11 * a12 * wb + a12 * a12 * bb + q * c1 * c1,
            a11 * a21 * ww + (a11 * a22 + a12 * a21) * wb + a12 * a22 * bb + q * c1,
            a21 * a21 * ww + 2 * a21 * a22 * wb + a22 * a22 * bb + q,
        )
        if not np.all(np.isfinite(ww)) or ww.max() > 1e30:  # unstable: no finite expected loss
            return float("inf")
    return float(0.5 * np.sum(h * ww))


@functools.lru_cache(maxsize=2)
def best_fixed_heavy_ball(noise: float) -> tuple[float, float]:
    """``(a*, E[L_T](a*))`` of fixed-step heavy ball for the budget, by bounded scalar search."""
    return minimize_step(lambda a: expected_loss_heavy_ball(a, noise), (1e-5, 0.4), 1e-6)


def test_heavy_ball_recursion_matches_simulated_torch_sgd() -> None:
    # The reference itself, checked by simulation (common practice): 200 runs of torch.optim.SGD's momentum rule.
    noise, a = 0.1, 0.01
    gen = torch.Generator().manual_seed(0)
    h = torch.tensor(CURVATURES)
    w = torch.nn.Parameter(torch.ones(200, DIM, dtype=torch.float64))
    opt = torch.optim.SGD([w], lr=a, momentum=MOMENTUM)
    for _ in range(STEPS):
        w.grad = h * w.detach() + torch.randn(w.shape, generator=gen, dtype=torch.float64) * (noise * h).sqrt()
        opt.step()
    simulated = float((0.5 * (h * w.detach() ** 2).sum(dim=1)).mean())
    assert simulated == pytest.approx(expected_loss_heavy_ball(a, noise), rel=0.05)


@pytest.mark.parametrize("noise", [pytest.param(0.01, marks=pytest.mark.slow), 1.0])
@pytest.mark.parametrize("typed", [1e-3, 1e3], ids=["1000x_too_small", "1000x_too_large"])
def test_momentum_tower_ends_near_the_best_fixed_heavy_ball(noise: float, typed: float) -> None:
    a_star, loss_star = best_fixed_heavy_ball(noise)
    runs = [run_noisy(functools.partial(TowerSGD, momentum=MOMENTUM), a_star * typed, noise, s) for s in range(SEEDS)]
    mean_loss = float(np.mean([loss for loss, _ in runs]))
    # Measured (4 seeds, horizon 0.99): 0.62-0.80 x the optimum's expected loss; the one-step rule
    # (horizon 0, the default before session 12) ended 4.6x (noise 1, typed 1000x too large: its step
    # size settled at 7-9 a*) and 1.58x (typed 1000x too small).
    assert mean_loss <= 1.5 * loss_star, f"mean loss {mean_loss:.3g} vs best fixed heavy ball {loss_star:.3g}"
    # Measured: final step sizes 0.09-0.56 a* (annealing under noise, which the loss bound rewards);
    # a collapse (the loss bound's other failure) would sit orders of magnitude lower.
    assert min(a for _, a in runs) >= a_star / 20, f"step size collapsed: {min(a for _, a in runs):.3g} vs {a_star:.3g}"
