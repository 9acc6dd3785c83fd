"""The trail forgets steps taken at far larger rates (``trail.forget_larger_steps``).

References: the rule's own closed form per unit, ``E <- exp(u - u_before) E`` exactly when the
learned factor fell and lies below ``1 / FORGET_BELOW_PEAK`` of its peak, else ``E``
unchanged (common practice: the identity checked elementwise); and the noisy quadratic model
with torch.optim.Adam's best fixed rate (tests/test_noisy_quadratic.py), where this rule is
what keeps TowerAdam typed 1000x too small from collapsing.
"""

from __future__ import annotations

import math

import pytest
import torch

from stepsize_tower import TowerAdam, trail
from stepsize_tower.levels import Level, init_tower_state


def _case(u_before: list[float], u_now: list[float], peak: list[float]) -> tuple[dict, list[dict], list[torch.Tensor]]:
    ts = init_tower_state([Level()], len(u_now), torch.device("cpu"))
    ts["log_step"][:, 0] = torch.tensor(u_now, dtype=torch.float64)
    ts[trail.PEAK_KEY] = torch.tensor(peak, dtype=torch.float64)
    gen = torch.Generator().manual_seed(0)
    states = [{trail.TRAIL_KEY: torch.randn(5, generator=gen)} for _ in u_now]
    return ts, states, [st[trail.TRAIL_KEY].clone() for st in states]


def test_only_a_fall_far_below_the_peak_scales_the_trail_by_the_fall() -> None:
    low = math.log(1 / trail.FORGET_BELOW_PEAK)
    # units: fell below peak/8 | fell but above peak/8 | rose below peak/8 | fell exactly onto peak/8
    u_before = [low - 0.5, -0.5, low - 1.0, low + 0.2]
    u_now = [low - 0.8, -1.0, low - 0.5, low]
    ts, states, before = _case(u_before, u_now, [0.0] * 4)
    trail.forget_larger_steps(ts, torch.tensor(u_before, dtype=torch.float64), states, [0, 1, 2, 3])
    expected = [math.exp(-0.3), 1.0, 1.0, 1.0]
    for st, old, r in zip(states, before, expected, strict=True):
        torch.testing.assert_close(st[trail.TRAIL_KEY], old * r, rtol=1e-6, atol=0.0)


def test_the_peak_follows_the_largest_factor_and_a_masked_step_changes_nothing() -> None:
    ts, states, before = _case([0.0], [0.7], [0.2])
    trail.forget_larger_steps(ts, torch.zeros(1, dtype=torch.float64), states, [0])
    assert float(ts[trail.PEAK_KEY][0]) == pytest.approx(0.7)
    ts, states, before = _case([-2.0], [-3.0], [0.0])
    trail.forget_larger_steps(ts, torch.tensor([-2.0], dtype=torch.float64), states, [0], keep=torch.tensor(False))
    assert torch.equal(states[0][trail.TRAIL_KEY], before[0])
    trail.forget_larger_steps(ts, torch.tensor([-2.0], dtype=torch.float64), states, [0], keep=torch.tensor(True))
    torch.testing.assert_close(states[0][trail.TRAIL_KEY], before[0] * math.exp(-1.0), rtol=1e-6, atol=0.0)


def test_a_tower_without_a_large_fall_is_unchanged_bitwise() -> None:
    # A run whose factor never falls 8x below its peak must be the run without the rule.
    def run(factor: float) -> torch.Tensor:
        old = trail.FORGET_BELOW_PEAK
        trail.FORGET_BELOW_PEAK = factor
        try:
            torch.manual_seed(0)
            w = torch.nn.Parameter(torch.randn(30))
            opt = TowerAdam([w], lr=1e-3)
            for _ in range(60):
                w.grad = w.detach() * torch.linspace(0.1, 1.0, 30) + 0.01 * torch.randn(30)
                opt.step()
            return w.detach().clone()
        finally:
            trail.FORGET_BELOW_PEAK = old

    assert torch.equal(run(trail.FORGET_BELOW_PEAK), run(1e30))
