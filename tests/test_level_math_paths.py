"""The two implementations of one tower step agree: Python floats (CPU) and tensor ops.

On the CPU the levels' few scalars are updated in Python floats (per-op overhead dominates
there); on accelerators and inside ``torch.compile`` the same math runs as tensor ops with
no host read. Reference: each other, on random states, to float64 rounding (common
practice: two implementations of one formula checked against each other); the float path
is also the one every CPU hypergradient test (test_hypergradients.py, against autograd) runs.
"""

from __future__ import annotations

import pytest
import torch

from stepsize_tower.levels import Level, init_tower_state
from stepsize_tower.levels.host_path import tower_step_host as _tower_step_host
from stepsize_tower.levels.tensor_path import tower_step_tensors as _tower_step_tensors

STACKS = {
    "adam": [Level("adam", lr=0.05)],
    "sgd": [Level("sgd", lr=0.1)],
    "adam_adam": [Level("adam", lr=0.05), Level("adam", lr=0.01)],
    "adam_shrink": [Level("adam", lr=0.05, shrink=0.3), Level("sgd", lr=0.01, shrink=0.5)],
    "adam_consistency": [Level("adam", lr=0.05, consistency=1.0), Level("adam", lr=0.01, consistency=2.0)],
    "sgd_adam_sgd": [Level("sgd", lr=0.2), Level("adam", lr=0.03, betas=(0.8, 0.99)), Level("sgd", lr=1e-3)],
}


def _random_state(levels: list[Level], units: int, step: int, seed: int) -> dict[str, torch.Tensor]:
    gen = torch.Generator().manual_seed(seed)
    ts = init_tower_state(levels, units, torch.device("cpu"))
    d = len(levels)
    ts["log_step"].copy_(torch.randn(units, d, generator=gen, dtype=torch.float64))
    ts["prev_step"].copy_(torch.rand(units, d, generator=gen, dtype=torch.float64) * 0.1)
    ts["prev_dir"].copy_(torch.randn(units, d, generator=gen, dtype=torch.float64))
    ts["exp_avg"].copy_(torch.randn(units, d, generator=gen, dtype=torch.float64))
    ts["exp_avg_sq"].copy_(torch.rand(units, d, generator=gen, dtype=torch.float64) + 0.1)
    ts["step"].fill_(step)
    return ts


@pytest.mark.parametrize("step", [0, 1, 7])
@pytest.mark.parametrize("units", [1, 3])
@pytest.mark.parametrize("stack", list(STACKS))
def test_float_and_tensor_paths_of_a_tower_step_agree(stack: str, units: int, step: int) -> None:
    levels = STACKS[stack]
    # a direction raised to the power 1 + c carries (1 + c) times its relative rounding
    rtol = 1e-14 * (1 + max(lv.consistency for lv in levels))
    for seed in range(5):
        host = _random_state(levels, units, step, seed)
        tensors = {k: v.clone() for k, v in host.items()}
        dot = torch.randn(units, generator=torch.Generator().manual_seed(100 + seed), dtype=torch.float64) * 10.0
        lr = 0.3
        a_host = _tower_step_host(host, levels, dot, lr)
        a_tensors = _tower_step_tensors(tensors, levels, dot, lr)
        torch.testing.assert_close(a_host, a_tensors, rtol=1e-14, atol=0.0)
        for key in host:
            torch.testing.assert_close(host[key], tensors[key], rtol=rtol, atol=1e-300, msg=key)
        if step > 0:  # the step really moved the levels
            assert not torch.equal(host["log_step"], _random_state(levels, units, step, seed)["log_step"])


@pytest.mark.parametrize("units", [1, 3])
@pytest.mark.parametrize("stack", ["adam", "adam_adam", "sgd_adam_sgd"])
def test_float_and_tensor_paths_agree_during_the_growth_search(stack: str, units: int) -> None:
    # reference: each other (as above), with units in, entering and leaving the growth search
    levels = STACKS[stack]
    for seed in range(5):
        gen = torch.Generator().manual_seed(200 + seed)
        host = _random_state(levels, units, 7, seed)
        host["search"].copy_(torch.tensor([-1.0, 0.0, 4.0, 40.0])[torch.randint(0, 4, (units,), generator=gen)])
        tensors = {k: v.clone() for k, v in host.items()}
        dot = torch.randn(units, generator=gen, dtype=torch.float64) * 10.0
        search_dot = torch.randn(units, generator=gen, dtype=torch.float64)
        a_host = _tower_step_host(host, levels, dot, 0.3, search_dot, 0.5)
        a_tensors = _tower_step_tensors(tensors, levels, dot, 0.3, search_dot, 0.5)
        torch.testing.assert_close(a_host, a_tensors, rtol=1e-14, atol=0.0)
        for key in host:  # atol: a level moment that nearly cancels (m ~ 5e-4 from O(1) terms)
            torch.testing.assert_close(host[key], tensors[key], rtol=1e-14, atol=1e-15, msg=key)
        assert not torch.equal(host["search"], _random_state(levels, units, 7, seed)["search"])
