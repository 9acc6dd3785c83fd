"""``Level.shrink``: moves that lower the step size are scaled, moves that raise it are not.

Reference: the plain (symmetric) level rule of the published method, run from the same state;
``shrink=1`` must be it exactly, and ``shrink=ρ`` must make ρ times each lowering move of that
rule and the same raising moves (common practice for an asymmetric step rule: the identity
``u' - u = ρ (u'_sym - u)`` per unit and step).
"""

from __future__ import annotations

import math

import pytest
import torch

from stepsize_tower import TowerAdam
from stepsize_tower.levels import Level, init_tower_state
from stepsize_tower.levels.host_path import tower_step_host
from stepsize_tower.levels.tensor_path import tower_step_tensors

UNITS = 6


def _state(level: Level) -> dict[str, torch.Tensor]:
    gen = torch.Generator().manual_seed(0)
    ts = init_tower_state([level], UNITS, torch.device("cpu"))
    ts["exp_avg"].copy_(torch.randn(UNITS, 1, generator=gen, dtype=torch.float64))
    ts["exp_avg_sq"].copy_(torch.rand(UNITS, 1, generator=gen, dtype=torch.float64) + 0.1)
    ts["prev_step"].fill_(0.01)
    ts["prev_dir"].fill_(1.0)
    ts["step"].fill_(5)
    return ts


@pytest.mark.parametrize("path", [tower_step_host, tower_step_tensors], ids=["host", "tensor"])
@pytest.mark.parametrize("kind", ["adam", "sgd"])
def test_lowering_moves_are_scaled_and_raising_moves_are_not(path: object, kind: str) -> None:
    # Hypergradients of both signs: half the units are asked to shrink, half to grow.
    dot = torch.tensor([3.0, -2.0, 0.5, -0.1, 7.0, -4.0], dtype=torch.float64)
    moves = {}
    for shrink in (1.0, 0.25):
        ts = _state(Level(kind, lr=0.05, shrink=shrink))
        before = ts["log_step"][:, 0].clone()
        path(ts, [Level(kind, lr=0.05, shrink=shrink)], dot, 1.0)  # type: ignore[operator]
        moves[shrink] = ts["log_step"][:, 0] - before
    lowered = moves[1.0] < 0
    assert lowered.any() and (~lowered).any(), "the case must move units both ways"
    torch.testing.assert_close(moves[0.25][lowered], 0.25 * moves[1.0][lowered], rtol=1e-12, atol=0.0)
    assert torch.equal(moves[0.25][~lowered], moves[1.0][~lowered])


def test_a_discounted_tower_shrinks_more_slowly_on_an_overshooting_quadratic() -> None:
    # Behaviour end to end: Adam typed far too large on a quadratic, start-up retreats off so
    # that only the level lowers the rate; with shrink=0.25 it falls by well under half as much
    # in log terms (about a quarter, the rate's history differs from the symmetric run's).
    def final_rate(shrink: float) -> float:
        w = torch.nn.Parameter(torch.full((20,), 1.0, dtype=torch.float64))
        opt = TowerAdam(
            [w], lr=0.5, retreat=False, first_step_limit=None, levels=[Level("adam", lr=0.05, shrink=shrink)]
        )
        for _ in range(40):
            w.grad = torch.linspace(0.1, 2.0, 20, dtype=torch.float64) * w.detach()
            opt.step()
        return opt.step_sizes()[0][0]

    fall_symmetric, fall_discounted = math.log(0.5 / final_rate(1.0)), math.log(0.5 / final_rate(0.25))
    assert fall_symmetric > 0.2, "the case must make the symmetric rule shrink"
    assert 0 < fall_discounted < 0.5 * fall_symmetric


@pytest.mark.parametrize("bad", [0.0, -0.5, 1.5, float("nan"), "half"])
def test_a_shrink_outside_zero_to_one_is_refused_with_its_range(bad: object) -> None:
    with pytest.raises(ValueError, match="expected 0 < shrink <= 1"):
        Level("adam", shrink=bad)  # type: ignore[arg-type]


def test_a_level_saved_without_shrink_resumes_with_the_symmetric_rule() -> None:
    w = torch.nn.Parameter(torch.ones(3))
    opt = TowerAdam([w], lr=1e-3)
    state = opt.state_dict()
    for spec in state["param_groups"][0]["levels"]:
        spec.pop("shrink")  # a checkpoint written before the field existed
    again = TowerAdam([w], lr=1e-3, levels=[Level("adam", lr=0.05, shrink=0.5)])
    again.load_state_dict(state)
    assert again.param_groups[0]["levels"][0].get("shrink", 1.0) == 1.0
