"""``torch.compile`` with a real backend (inductor) over the optimizers' step.

Reference: the same steps run eagerly (itself checked against torch.optim elsewhere), and
dynamo's own recompile guard (``error_on_recompile``). The "eager" backend never traces the
ops into a graph, so it cannot find kernels that have no fake implementation; inductor does.
Each configuration compiles for tens of seconds on a 2-core CPU: one whole training step in
the default run, every class at depth 0 and at defaults in the slow run.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from typing import Any

import pytest
import torch
from torch import nn

from stepsize_tower import TowerAdam, TowerAdamW, TowerSGD
from stepsize_tower.bases import compiled as _compiled

WARMUP = 12  # past the start-up window, where the step reads the step count
CHECKED = 6


# A compiled step traces the reference ops (the native CPU kernels stay out of graphs): eager
# runs on the same path (conftest.py).
pytestmark = pytest.mark.usefixtures("reference_path")


@pytest.fixture(autouse=True)
def _needs_inductor() -> Iterator[None]:
    if not _compiled.available():
        pytest.skip("torch.compile (inductor with a C++ compiler) is not usable here")
    torch._dynamo.reset()
    yield
    torch._dynamo.reset()


def _batch(s: int) -> tuple[torch.Tensor, torch.Tensor]:
    g = torch.Generator().manual_seed(s)
    return torch.randn(16, 6, generator=g), torch.randn(16, 2, generator=g)


def _run(factory: Callable[[Any], torch.optim.Optimizer], compile_step: bool) -> tuple[nn.Module, Any]:
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(6, 8), nn.Tanh(), nn.Linear(8, 2))
    opt = factory(model.parameters())

    def train_step(x: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
        opt.zero_grad()
        loss = nn.functional.mse_loss(model(x), y)
        loss.backward()
        opt.step()
        return loss.detach()

    step = torch.compile(train_step, backend="inductor") if compile_step else train_step
    with torch._dynamo.config.patch(fail_on_recompile_limit_hit=True):
        for s in range(WARMUP):
            step(*_batch(s))
        with torch._dynamo.config.patch(error_on_recompile=True):
            for s in range(WARMUP, WARMUP + CHECKED):
                step(*_batch(s))
    return model, opt


def _check_same_as_eager(factory: Callable[[Any], torch.optim.Optimizer]) -> None:
    compiled_model, compiled_opt = _run(factory, compile_step=True)
    eager_model, eager_opt = _run(factory, compile_step=False)
    for pc, pe in zip(compiled_model.parameters(), eager_model.parameters(), strict=True):
        torch.testing.assert_close(pc, pe, rtol=1e-4, atol=1e-6)
    assert compiled_opt.step_sizes()[0] == pytest.approx(eager_opt.step_sizes()[0], rel=1e-4)


def test_compiled_training_step_with_learned_step_size_runs_under_inductor() -> None:
    _check_same_as_eager(lambda p: TowerAdam(p, lr=1e-2))


CONFIGS = {
    "sgd_momentum_depth0": lambda p: TowerSGD(p, lr=1e-2, momentum=0.9, depth=0),
    "sgd_momentum": lambda p: TowerSGD(p, lr=1e-2, momentum=0.9),
    "sgd": lambda p: TowerSGD(p, lr=1e-2),
    "adam_depth0": lambda p: TowerAdam(p, lr=1e-2, depth=0),
    "adamw_depth0": lambda p: TowerAdamW(p, lr=1e-2, depth=0),
    "adamw": lambda p: TowerAdamW(p, lr=1e-2),
}


@pytest.mark.slow
@pytest.mark.parametrize("name", sorted(CONFIGS))
def test_every_class_compiles_under_inductor(name: str) -> None:
    _check_same_as_eager(CONFIGS[name])
