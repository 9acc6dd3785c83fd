"""While a schedule anneals ``lr``, level 1 makes a tenth of each move that lowers the step size.

References: the rule itself is :attr:`Level.shrink` applied on the steps whose ``lr`` is below
its peak, so a run must equal, bit for bit, the same run with the hold-back off and
``Level(shrink=0.1)`` where the schedule anneals (common practice for a reweighted step rule);
constant-``lr`` runs and warm-ups must not change at all. The outside check is the noisy
quadratic model (Zhang et al., NeurIPS 2019) under 5 % warm-up + cosine: the expected loss of
plain SGD on that schedule follows the same per-coordinate recursion as at a fixed rate,
``E[w_i²]_{t+1} = (1 - a_t h_i)² E[w_i²]_t + a_t² c h_i`` with ``a_t = a · f(t)``, so the best
peak rate for the schedule is found by a scalar minimization (SciPy).
"""

from __future__ import annotations

import functools
import math
from collections.abc import Callable
from typing import Any

import numpy as np
import pytest
import torch
from torch import nn

import stepsize_tower.engine as engine
from stepsize_tower import Level, TowerAdam, TowerSGD
from stepsize_tower.options import DEFAULT_SCHEDULE_HOLD_BACK
from stepsize_tower.schedule_anneal import PEAK_LR_KEY
from tests.test_noisy_quadratic import CURVATURES, SEEDS, minimize_step, run_noisy
from tests.test_noisy_quadratic import STEPS as NQM_STEPS
from tests.tiny_net import tanh_module

STEPS = 60
DECAY = 25  # the schedule is constant, then decays from this step on


def _batch(step: int) -> tuple[torch.Tensor, torch.Tensor]:
    gen = torch.Generator().manual_seed(step)
    x = torch.randn(32, 8, generator=gen, dtype=torch.float64)
    return x, torch.sin(x.sum(dim=1, keepdim=True)) + 0.3 * torch.randn(32, 1, generator=gen, dtype=torch.float64)


def _decaying(step: int) -> float:
    return 1.0 if step < DECAY else 1.0 / (1.0 + 0.05 * (step - DECAY + 1))


def _warmup(step: int) -> float:
    return min(1.0, (step + 1) / 20)


def _train(
    make: Callable[..., torch.optim.Optimizer], factor: Callable[[int], float], steps: range, state: Any = None
) -> tuple[nn.Module, torch.optim.Optimizer, Any]:
    model = tanh_module()
    opt = make(model.parameters())
    sched = torch.optim.lr_scheduler.LambdaLR(opt, factor)
    if state is not None:
        model.load_state_dict(state[0])
        opt.load_state_dict(state[1])
        sched.load_state_dict(state[2])
    for step in steps:
        opt.zero_grad()
        x, y = _batch(step)
        nn.functional.mse_loss(model(x), y).backward()
        opt.step()
        sched.step()
    return model, opt, sched


def _outcome(model: nn.Module, opt: torch.optim.Optimizer) -> list[torch.Tensor]:
    return [p.detach().clone() for p in model.parameters()] + [opt.param_groups[0]["tower"]["log_step"].clone()]


def _assert_same(a: list[torch.Tensor], b: list[torch.Tensor]) -> None:
    for x, y in zip(a, b, strict=True):
        assert torch.equal(x, y)


def _adam(**kw: Any) -> Callable[..., torch.optim.Optimizer]:
    return functools.partial(TowerAdam, lr=3e-3, **kw)


def _decaying_from_one(step: int) -> float:
    return 1.0 / (1.0 + 0.05 * step)


@pytest.mark.parametrize("masked", [False, True], ids=["read_path", "masked_path"])
@pytest.mark.parametrize("share", [None, 0.5], ids=["default", "share_0.5"])
def test_while_the_schedule_anneals_level_one_makes_its_share_of_each_lowering_move(
    masked: bool, share: float | None, monkeypatch: pytest.MonkeyPatch
) -> None:
    # the schedule anneals from step 1 on (step 0 is the first step: the level has no move yet)
    monkeypatch.setattr(engine, "MASK_ON_CPU", masked)
    typed = {} if share is None else {"schedule_hold_back": share}
    held = _outcome(*_train(_adam(**typed), _decaying_from_one, range(STEPS))[:2])
    plain = _outcome(*_train(_adam(schedule_hold_back=1.0), _decaying_from_one, range(STEPS))[:2])
    shrink = Level(kind="adam", lr=0.05, shrink=DEFAULT_SCHEDULE_HOLD_BACK if share is None else share)
    same_rule = _adam(levels=[shrink], schedule_hold_back=1.0)
    _assert_same(held, _outcome(*_train(same_rule, _decaying_from_one, range(STEPS))[:2]))
    assert held[-1][0, 0] > plain[-1][0, 0], "the case must make lowering moves: held back, the factor ends higher"


def _group_typed_off(params: Any) -> torch.optim.Optimizer:
    return TowerAdam([{"params": list(params), "schedule_hold_back": 1.0}], lr=3e-3)


def test_the_hold_back_is_set_per_group() -> None:
    # reference: the group's own value decides (torch's param-group contract): a group typed 1 runs as the
    # constructor's 1 does, and not as the default
    off = _outcome(*_train(_adam(schedule_hold_back=1.0), _decaying_from_one, range(STEPS))[:2])
    model, opt, _ = _train(_group_typed_off, _decaying_from_one, range(STEPS))
    assert opt.param_groups[0]["schedule_hold_back"] == 1.0
    _assert_same(_outcome(model, opt), off)
    default = _outcome(*_train(_adam(), _decaying_from_one, range(STEPS))[:2])
    assert not torch.equal(default[-1], off[-1])


@pytest.mark.parametrize("bad", [0.0, -0.1, 1.5, float("nan"), "0.1"])
def test_a_bad_hold_back_says_what_is_expected(bad: Any) -> None:
    with pytest.raises(ValueError, match=r"schedule_hold_back.*\(0, 1\]"):
        TowerAdam([torch.zeros(2, requires_grad=True)], schedule_hold_back=bad)


@pytest.mark.parametrize("factor", [lambda s: 1.0, _warmup], ids=["constant", "warmup"])
def test_runs_whose_lr_never_falls_are_unchanged(factor: Callable[[int], float]) -> None:
    model, opt, _ = _train(_adam(), factor, range(STEPS))
    assert PEAK_LR_KEY not in opt.param_groups[0]["tower"], "nothing is stored before the lr falls"
    ours = _outcome(model, opt)
    _assert_same(ours, _outcome(*_train(_adam(schedule_hold_back=1.0), factor, range(STEPS))[:2]))


@pytest.mark.parametrize("make", [_adam(), functools.partial(TowerSGD, lr=0.05)], ids=["adam", "sgd"])
def test_a_run_resumed_mid_schedule_anneals_on_the_same_steps(make: Callable[..., torch.optim.Optimizer]) -> None:
    # reference: the uninterrupted run (torch's state_dict contract); the resumed optimizer's
    # first step has lr below the peak it was lowered from, which only the kept peak shows
    whole = _outcome(*_train(make, _decaying, range(STEPS))[:2])
    model, opt, sched = _train(make, _decaying, range(DECAY + 5))
    assert PEAK_LR_KEY in opt.param_groups[0]["tower"]
    saved = (model.state_dict(), opt.state_dict(), sched.state_dict())
    resumed = _outcome(*_train(make, _decaying, range(DECAY + 5, STEPS), state=saved)[:2])
    _assert_same(resumed, whole)


def test_without_the_kept_peak_a_resumed_run_would_differ() -> None:
    # the resume test above has teeth: dropping the key changes the continuation
    whole = _outcome(*_train(_adam(), _decaying, range(STEPS))[:2])
    model, opt, sched = _train(_adam(), _decaying, range(DECAY + 5))
    saved_opt = opt.state_dict()
    del saved_opt["param_groups"][0]["tower"][PEAK_LR_KEY]
    resumed = _outcome(
        *_train(_adam(), _decaying, range(DECAY + 5, STEPS), state=(model.state_dict(), saved_opt, sched.state_dict()))[
            :2
        ]
    )
    assert not all(torch.equal(a, b) for a, b in zip(resumed, whole, strict=True))


# ---------------------------------------------------------------- the noisy quadratic model

WARM = round(0.05 * NQM_STEPS)


def _cosine(t: int) -> float:
    """5 % linear warm-up, then cosine to 0 (the field benchmark's shape)."""
    if t < WARM:
        return (t + 1) / WARM
    return 0.5 * (1.0 + math.cos(math.pi * min(1.0, (t - WARM) / (NQM_STEPS - WARM))))


def _expected_loss(a: float, noise: float) -> float:
    second = np.ones(len(CURVATURES))
    for t in range(NQM_STEPS):
        at = a * _cosine(t)
        second = (1.0 - at * CURVATURES) ** 2 * second + at * at * noise * CURVATURES
    return float(0.5 * np.sum(CURVATURES * second))


@functools.lru_cache(maxsize=2)
def _best_scheduled(noise: float) -> tuple[float, float]:
    return minimize_step(lambda a: _expected_loss(a, noise), (1e-4, 4.0), 1e-4)


def _tower_sgd_on_schedule(lr: float, noise: float, seed: int) -> float:
    return run_noisy(TowerSGD, lr, noise, seed, factor=_cosine)[0]


# Measured, mean loss ÷ the best scheduled SGD's expected loss (4 seeds): with the hold-back
# 0.97 (noise 1, typed 1e-3x) and 1.39 (noise 0.01, typed 1e3x); without it 1.49 and 2.46.
@pytest.mark.parametrize(
    ("noise", "typed", "bound"), [(1.0, 1e-3, 1.25), (0.01, 1e3, 1.5)], ids=["noise1_too_small", "noise001_too_large"]
)
def test_tower_under_warmup_cosine_ends_near_the_best_scheduled_sgd(noise: float, typed: float, bound: float) -> None:
    a_star, loss_star = _best_scheduled(noise)
    mean = float(np.mean([_tower_sgd_on_schedule(a_star * typed, noise, s) for s in range(SEEDS)]))
    assert mean <= bound * loss_star, f"{mean:.3g} vs the best scheduled SGD's {loss_star:.3g}"


@pytest.mark.xfail(strict=True, reason="too small a start under a decaying schedule: 2.04x (measured), open work")
def test_tower_typed_far_too_small_under_a_low_noise_cosine_ends_near_the_best() -> None:
    a_star, loss_star = _best_scheduled(0.01)
    mean = float(np.mean([_tower_sgd_on_schedule(a_star * 1e-3, 0.01, s) for s in range(SEEDS)]))
    assert mean <= 1.5 * loss_star
