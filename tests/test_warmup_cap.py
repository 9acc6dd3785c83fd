"""Under a warm-up, every step whose lr rises to a new peak is capped like the first step.

The cap is ``a_0 <= c · s``, ``s`` the geometric mean of the per-tensor RMS of the weights
(:mod:`stepsize_tower.safeguards`); the reference for ``s`` is SciPy's ``gmean`` of the RMS
values computed with NumPy from the weights before the step.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pytest
import torch
from scipy.stats import gmean
from torch import nn

import stepsize_tower.engine as engine
from stepsize_tower import TowerAdam, TowerAdamW
from stepsize_tower.options import DEFAULT_FIRST_STEP_LIMIT
from tests.tiny_net import tanh_module

WARM = 40


def _batch(step: int) -> tuple[torch.Tensor, torch.Tensor]:
    gen = torch.Generator().manual_seed(step)
    x = torch.randn(32, 8, generator=gen, dtype=torch.float64)
    return x, torch.sin(x.sum(dim=1, keepdim=True))


def _typical_scale(model: nn.Module) -> float:
    rms = [np.sqrt(np.mean(p.detach().numpy() ** 2)) for p in model.parameters()]
    return float(gmean([r for r in rms if r > 0]))


def _run(
    factor: Callable[[int], float], lr: float, steps: int, make: Callable[..., torch.optim.Optimizer] = TowerAdam
) -> list[tuple[float, float, float]]:
    """Per step: (the scheduler's lr, the step size used, the cap c·s before the step)."""
    model = tanh_module()
    opt = make(model.parameters(), lr=lr)
    sched = torch.optim.lr_scheduler.LambdaLR(opt, factor)
    out = []
    for step in range(steps):
        opt.zero_grad()
        x, y = _batch(step)
        nn.functional.mse_loss(model(x), y).backward()
        cap = DEFAULT_FIRST_STEP_LIMIT * _typical_scale(model)
        outer = opt.param_groups[0]["lr"]
        opt.step()
        out.append((outer, float(opt.param_groups[0]["effective_lr"]), cap))
        sched.step()
    return out


def _warmup(step: int) -> float:
    return min(1.0, (step + 1) / WARM)


@pytest.mark.parametrize("make", [TowerAdam, TowerAdamW])
def test_rising_steps_of_a_warmup_are_capped_like_the_first(make: Callable[..., torch.optim.Optimizer]) -> None:
    trace = _run(_warmup, lr=10.0, steps=WARM + 5, make=make)
    for step, (_, used, cap) in enumerate(trace[:WARM]):
        assert used <= cap * (1 + 1e-9), f"step {step}: a_0 = {used:.3g} above the cap {cap:.3g}"
    # without the cap the warm-up carries the typed rate through: 10 / 40 at step 0 is already above it
    assert trace[0][0] > 10 * trace[0][2]


def test_a_warmup_from_zero_caps_the_first_positive_factor() -> None:
    trace = _run(lambda s: s / WARM, lr=10.0, steps=5)
    assert trace[0][1] == 0.0
    for step, (_, used, cap) in enumerate(trace[1:], start=1):
        assert used <= cap * (1 + 1e-9), f"step {step}: a_0 = {used:.3g} above the cap {cap:.3g}"


def test_a_return_to_an_earlier_peak_is_not_capped() -> None:
    """A decay then a return to the first lr: bitwise the run with the limit off after the first step."""

    def down_and_back(step: int) -> float:
        return 0.1 if 5 <= step < 10 else 1.0

    lr = 1e-4  # below the cap: the first step is not cut either
    capped = _run(down_and_back, lr=lr, steps=20)
    free = _run(down_and_back, lr=lr, steps=20, make=lambda p, lr: TowerAdam(p, lr=lr, first_step_limit=None))
    assert [used for _, used, _ in capped] == [used for _, used, _ in free]


@pytest.mark.usefixtures("reference_path")  # stands in for an accelerator (conftest.py)
def test_masked_warmup_steps_equal_the_read_path_bitwise(monkeypatch: pytest.MonkeyPatch) -> None:
    """A warm-up longer than the start-up window: its capped steps are masked steps on accelerators."""
    monkeypatch.setattr(engine, "MASK_ON_CPU", True)
    masked = _run(_warmup, lr=10.0, steps=WARM + 5)
    monkeypatch.setattr(engine, "MASK_ON_CPU", False)
    read = _run(_warmup, lr=10.0, steps=WARM + 5)
    assert masked == read


def test_the_cap_runs_on_rising_steps_only(monkeypatch: pytest.MonkeyPatch) -> None:
    """A warm-up is checked on each of its steps; a decay and a return to the peak never are."""
    calls: list[int] = []
    original = engine.limit_first_step

    def spy(*args: object, **kwargs: object) -> torch.Tensor:
        calls.append(len(calls))
        return original(*args, **kwargs)  # type: ignore[arg-type]

    monkeypatch.setattr(engine, "limit_first_step", spy)
    _run(lambda s: 0.1 if 5 <= s < 10 else 1.0, lr=1e-3, steps=20)
    assert len(calls) == 1, "only the first step may be capped when lr returns to its earlier peak"
    calls.clear()
    _run(_warmup, lr=1e-3, steps=WARM + 10)
    assert len(calls) == WARM, f"the cap ran on {len(calls)} steps of a {WARM}-step warm-up"
