"""``Level.consistency``: each lowering move of an Adam-like level is weighed by ``min(d, 1)^c``.

Reference: the plain level rule of the published method (moments of the hypergradient,
``d = m̂ / (sqrt(v̂) + eps)``, move ``a_k d``), run from the same state; ``consistency=0`` must
be it and ``consistency=c`` must make each lowering move (``d > 0``) ``min(d, 1)^c`` times the
plain one and each raising move the plain one (common practice for a reweighted step rule: an
identity per unit and step). The end-to-end cases use the noisy quadratic model (Zhang et al.,
NeurIPS 2019) at its closed-form best fixed step size, where the greedy hypergradient drifts
towards smaller steps on noise, and a noiseless quadratic overshot by a far too large step,
where it asks to shrink on every step.
"""

from __future__ import annotations

import math

import pytest
import torch

from stepsize_tower import TowerAdam, TowerSGD
from stepsize_tower.levels import Level, init_tower_state
from stepsize_tower.levels.host_path import tower_step_host
from stepsize_tower.levels.spec import MAX_LOG_CHANGE
from stepsize_tower.levels.tensor_path import tower_step_tensors
from tests.test_noisy_quadratic import best_fixed_step, run_noisy

UNITS = 8
LEVEL_LR = 0.05


def _state(level: Level) -> dict[str, torch.Tensor]:
    gen = torch.Generator().manual_seed(1)
    ts = init_tower_state([level], UNITS, torch.device("cpu"))
    ts["exp_avg"].copy_(torch.randn(UNITS, 1, generator=gen, dtype=torch.float64) * 3)
    ts["exp_avg_sq"].copy_(torch.rand(UNITS, 1, generator=gen, dtype=torch.float64) * 0.01)
    ts["prev_step"].fill_(0.01)
    ts["prev_dir"].fill_(1.0)
    ts["step"].fill_(5)
    return ts


DOTS = torch.tensor([3.0, -2.0, 0.5, -0.1, 7.0, -4.0, 0.02, -30.0], dtype=torch.float64)


def _moves(path: object, consistency: float) -> torch.Tensor:
    level = Level("adam", lr=LEVEL_LR, consistency=consistency)
    ts = _state(level)
    before = ts["log_step"][:, 0].clone()
    path(ts, [level], DOTS, 1.0)  # type: ignore[operator]
    return ts["log_step"][:, 0] - before


def _published_direction() -> torch.Tensor:
    """``d = m̂ / (sqrt(v̂) + eps)`` from the moments after this step's hypergradient ``h = -<g, D>``."""
    ts, (b1, b2), count = _state(Level("adam")), Level("adam").betas, 5
    h = -DOTS
    m = b1 * ts["exp_avg"][:, 0] + (1 - b1) * h
    v = b2 * ts["exp_avg_sq"][:, 0] + (1 - b2) * h * h
    return (m / (1 - b1**count)) / ((v / (1 - b2**count)).sqrt() + Level("adam").eps)


@pytest.mark.parametrize("path", [tower_step_host, tower_step_tensors], ids=["host", "tensor"])
@pytest.mark.parametrize("consistency", [0.0, 0.5, 1.0, 2.0])
def test_each_lowering_move_is_the_published_move_weighed_by_its_consistency(path: object, consistency: float) -> None:
    d = _published_direction()
    assert ((d > 0) & (d < 0.5)).any() and (d > 1).any(), "the case must hold weak and saturated lowering moves"
    assert ((d < 0) & (d > -1)).any(), "the case must hold weak raising moves (left as they are)"
    weighed = LEVEL_LR * torch.where(d > 0, d * d.clamp(0.0, 1.0) ** consistency, d)
    expected = -weighed.clamp(-MAX_LOG_CHANGE, MAX_LOG_CHANGE)  # u_0 moves against the direction
    torch.testing.assert_close(_moves(path, consistency), expected, rtol=1e-12, atol=1e-15)


def _nqm_final_step(consistency: float, seed: int) -> float:
    a_star, _ = best_fixed_step(1.0)
    levels = [Level("adam", lr=LEVEL_LR, consistency=consistency)]

    def make(params: object, lr: float) -> torch.optim.Optimizer:
        return TowerSGD(params, lr=lr, levels=levels)  # type: ignore[arg-type]

    return run_noisy(make, a_star, 1.0, seed)[1] / a_star


def test_a_weak_noisy_drift_is_mostly_held_back() -> None:
    # Started at the best fixed step for the budget, the plain rule anneals to about a third of
    # it on noise (|d| ~ 0.35); weighed (consistency=1), the fall in log terms is under a quarter.
    plain = [math.log(_nqm_final_step(0.0, s)) for s in range(2)]
    weighed = [math.log(_nqm_final_step(1.0, s)) for s in range(2)]
    assert min(plain) < math.log(0.5), "the case must make the plain rule drift down"
    assert sum(abs(x) for x in weighed) < 0.25 * sum(abs(x) for x in plain)


def test_a_consistent_shrink_is_held_back_far_less() -> None:
    # Adam typed far too large on a noiseless quadratic, start-up safeguards off: every step's
    # evidence asks to shrink, but its size falls with the weights, so |d| = |m̂|/sqrt(v̂) is
    # below 1 (v̂ remembers the larger early hypergradients). The weighed rule still makes
    # over a third of the plain fall (against under a quarter on noise, above).
    def fall(consistency: float) -> float:
        w = torch.nn.Parameter(torch.full((20,), 1.0, dtype=torch.float64))
        levels = [Level("adam", lr=LEVEL_LR, consistency=consistency)]
        opt = TowerAdam([w], lr=0.5, retreat=False, first_step_limit=None, levels=levels)
        for _ in range(40):
            w.grad = torch.linspace(0.1, 2.0, 20, dtype=torch.float64) * w.detach()
            opt.step()
        return math.log(0.5 / opt.step_sizes()[0][0])

    plain = fall(0.0)
    assert plain > 0.2, "the case must make the plain rule shrink"
    assert fall(1.0) > 0.35 * plain


@pytest.mark.parametrize("bad", [-0.5, 5.0, float("nan"), "one", True])
def test_a_consistency_outside_zero_to_four_is_refused_with_its_range(bad: object) -> None:
    with pytest.raises(ValueError, match=r"expected a number in \[0, 4\]"):
        Level("adam", consistency=bad)  # type: ignore[arg-type]


def test_consistency_on_an_sgd_level_is_refused_with_the_fix() -> None:
    with pytest.raises(ValueError, match=r"needs kind='adam'.*use consistency=0"):
        Level("sgd", consistency=1.0)


def test_a_level_saved_without_consistency_resumes_with_the_plain_rule() -> None:
    w = torch.nn.Parameter(torch.ones(3))
    opt = TowerAdam([w], lr=1e-3)
    state = opt.state_dict()
    for spec in state["param_groups"][0]["levels"]:
        spec.pop("consistency")  # a checkpoint written before the field existed
    again = TowerAdam([w], lr=1e-3, levels=[Level("adam", lr=0.05, consistency=1.0)])
    again.load_state_dict(state)
    w.grad = torch.ones(3)
    again.step()
    assert again.param_groups[0]["levels"][0].get("consistency", 0.0) == 0.0
