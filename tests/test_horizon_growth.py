"""A growing horizon: the trail spans as many updates as the run has taken, between two bounds.

``horizon=(γ_0, γ_1)``: at a step taken after ``s`` steps the trail's weight is
``ω_s = min(1 - γ_0, max(1 - γ_1, 1/s))`` and the level-0 hypergradient is
``ĥ_1 = -<g_s, E_{s-1}> / ω_s`` with ``E_j = (1 - ω_j) E_{j-1} + ω_j (w_j - w_{j+1})``. The
references are that recursion run on the recorded weights, the fixed horizon γ_0 (for the first
``1/(1-γ_0)`` steps), the read path (for the masked one) and the eager step (for the compiled one).
"""

from __future__ import annotations

from typing import Any

import pytest
import torch
from small_problems import recorded_run, tanh_regression
from torch import nn

from stepsize_tower import TowerAdam, TowerSGD, engine
from stepsize_tower import horizon as horizon_rules
from stepsize_tower.safeguards import RETREAT_WINDOW

GROWING = (0.5, 0.9)  # spans 2 ... 10 updates: the growth is over by step 10


def _omega(s: int) -> float:
    """The documented weight, written out (not the library's function)."""
    if s == 0:
        return 1 - GROWING[0]
    return min(1 - GROWING[0], max(1 - GROWING[1], 1 / s))


@pytest.mark.parametrize(
    "factory",
    [
        lambda p, lag: TowerSGD(p, lr=0.3, horizon=GROWING, retreat=False, lagged=lag),
        lambda p, lag: TowerSGD(p, lr=0.1, momentum=0.9, horizon=GROWING, retreat=False, lagged=lag),
        lambda p, lag: TowerAdam(p, lr=0.01, horizon=GROWING, retreat=False, lagged=lag),
    ],
    ids=["sgd", "momentum", "adam"],
)
@pytest.mark.parametrize("lagged", [False, True], ids=["exact", "lagged"])
@pytest.mark.parametrize("steps", [3, 7, 14])
def test_growing_horizon_hypergradient_is_gradient_against_recorded_trail(
    factory: Any, lagged: bool, steps: int
) -> None:
    # Reference: the recursion of the definition on the recorded weights (common practice).
    # Lagged, after the start-up window the step learns from the last step's value
    # (stepsize_tower.lag): step s from -<g_{s-1}, E_{s-2}> / ω_{s-1}.
    loss = tanh_regression()
    w = torch.zeros(8, dtype=torch.float64, requires_grad=True)
    opt = factory([w], lagged)
    history, _ = recorded_run(opt, w, loss, steps)
    s = steps - 2 if lagged and steps - 1 >= RETREAT_WINDOW else steps - 1
    at = history[s].clone().requires_grad_(True)
    (g_s,) = torch.autograd.grad(loss(at, s), at)
    trail = torch.zeros(8, dtype=torch.float64)
    for j in range(s):
        trail = (1 - _omega(j)) * trail + _omega(j) * (history[j] - history[j + 1])
    expected = -torch.dot(g_s, trail).item() / _omega(s)
    assert abs(expected) > 1e-8
    got = opt.param_groups[0]["tower"]["hypergrad"][0, 0].item()
    assert got == pytest.approx(expected, rel=1e-9, abs=1e-15)


def _train(make: Any, steps: int, seed: int = 0) -> tuple[nn.Module, Any]:
    torch.manual_seed(seed)
    model = nn.Sequential(nn.Linear(6, 12), nn.Tanh(), nn.Linear(12, 2))
    opt = make(model.parameters())
    for s in range(steps):
        gen = torch.Generator().manual_seed(100 + s)
        x = torch.randn(16, 6, generator=gen)
        opt.zero_grad()
        nn.functional.mse_loss(model(x), torch.sin(1.5 * x[:, :2])).backward()
        opt.step()
    return model, opt


def _same(a: nn.Module, b: nn.Module) -> bool:
    return all(torch.equal(p, q) for p, q in zip(a.parameters(), b.parameters(), strict=True))


@pytest.mark.parametrize("cls", [TowerSGD, TowerAdam], ids=["sgd", "adam"])
def test_growing_horizon_is_the_fixed_start_horizon_until_the_run_outgrows_it(cls: Any) -> None:
    # Reference: the fixed horizon γ_0 itself, for the 1/(1-γ_0) = 10 steps it spans.
    grow = (0.9, 0.99)
    fixed_model, _ = _train(lambda p: cls(p, lr=0.01, horizon=grow[0]), 10)
    grown_model, _ = _train(lambda p: cls(p, lr=0.01, horizon=grow), 10)
    assert _same(fixed_model, grown_model)
    fixed_model, _ = _train(lambda p: cls(p, lr=0.01, horizon=grow[0]), 30)
    grown_model, _ = _train(lambda p: cls(p, lr=0.01, horizon=grow), 30)
    assert not _same(fixed_model, grown_model), "the trail did not grow past its first span"


def test_weight_from_the_count_tensor_equals_the_host_weight() -> None:
    # The masked path and the read path must take the same ω for the same count (bitwise).
    for horizon in [(0.99, 0.999), (0.5, 0.9), (0.9, 0.9)]:
        counts = torch.arange(0, 3000, dtype=torch.int64)
        from_tensor = [horizon_rules.weight_tensor(horizon, c).item() for c in counts]
        assert from_tensor == [horizon_rules.weight_at(horizon, int(c)) for c in counts]


@pytest.mark.parametrize("cls", [TowerSGD, TowerAdam], ids=["sgd", "adam"])
def test_masked_steps_with_a_growing_horizon_equal_the_read_path(cls: Any, monkeypatch: pytest.MonkeyPatch) -> None:
    # Reference: the read path, where the host's exact count gives ω. Both on torch's kernels
    # (the native CPU kernels round differently from them, with any horizon).
    make = lambda p: cls(p, lr=0.01, horizon=(0.9, 0.99), native=False)  # noqa: E731 - grows over steps 10 ... 100
    monkeypatch.setattr(engine, "MASK_ON_CPU", True)
    masked_model, masked_opt = _train(make, 60)
    monkeypatch.setattr(engine, "MASK_ON_CPU", False)
    read_model, read_opt = _train(make, 60)
    assert _same(masked_model, read_model)
    assert masked_opt.step_sizes() == read_opt.step_sizes()


def test_compiled_step_does_not_recompile_as_the_horizon_grows() -> None:
    # A Python float that changes every step would be a dynamo guard: ω is a tensor under compile.
    torch._dynamo.reset()
    make = lambda p: TowerSGD(p, lr=0.01, momentum=0.9, horizon=(0.9, 0.99))  # noqa: E731
    eager_model, eager_opt = _train(make, 40)
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(6, 12), nn.Tanh(), nn.Linear(12, 2))
    opt = make(model.parameters())

    @torch.compile(backend="eager")
    def compiled_step() -> None:
        opt.step()

    try:
        with torch._dynamo.config.patch(fail_on_recompile_limit_hit=True):
            for s in range(40):
                gen = torch.Generator().manual_seed(100 + s)
                x = torch.randn(16, 6, generator=gen)
                opt.zero_grad()
                nn.functional.mse_loss(model(x), torch.sin(1.5 * x[:, :2])).backward()
                if s == 15:  # settled: from here every step lengthens the trail
                    guard = torch._dynamo.config.patch(error_on_recompile=True)
                    guard.__enter__()
                compiled_step()
            guard.__exit__(None, None, None)
    finally:
        torch._dynamo.reset()
    for p, q in zip(model.parameters(), eager_model.parameters(), strict=True):
        torch.testing.assert_close(p, q, rtol=1e-6, atol=1e-7)
    assert opt.step_sizes()[0] == pytest.approx(eager_opt.step_sizes()[0], rel=1e-6)


def test_resuming_a_growing_horizon_from_state_dict_is_bit_exact() -> None:
    # Reference: the uninterrupted run (the count that sets ω travels in the tower state).
    make = lambda p: TowerSGD(p, lr=0.01, momentum=0.9, horizon=(0.9, 0.99))  # noqa: E731
    full_model, full_opt = _train(make, 50)
    model, opt = _train(make, 30)
    fresh = make(model.parameters())
    fresh.load_state_dict(opt.state_dict())
    assert fresh.param_groups[0]["horizon"] == (0.9, 0.99)
    for s in range(30, 50):
        gen = torch.Generator().manual_seed(100 + s)
        x = torch.randn(16, 6, generator=gen)
        fresh.zero_grad()
        nn.functional.mse_loss(model(x), torch.sin(1.5 * x[:, :2])).backward()
        fresh.step()
    assert _same(model, full_model)
    assert fresh.step_sizes() == full_opt.step_sizes()


@pytest.mark.parametrize(
    "bad", [(0.999, 0.99), (0.0, 0.99), (0.99,), (0.99, 1.0), ("a", 0.9), (0.9, 0.99, 0.999), 1.0, True]
)
def test_invalid_horizon_is_rejected_with_what_to_type(bad: Any) -> None:
    w = nn.Parameter(torch.zeros(3))
    with pytest.raises(ValueError, match=r"Invalid horizon.*start, end"):
        TowerSGD([w], lr=0.1, horizon=bad)


def test_a_growing_horizon_may_be_given_as_a_list() -> None:
    # YAML recipes and JSON give sequences as lists.
    w = nn.Parameter(torch.zeros(3))
    opt = TowerSGD([w], lr=0.1, horizon=[0.99, 0.999])
    assert horizon_rules.is_growing(opt.param_groups[0]["horizon"])
