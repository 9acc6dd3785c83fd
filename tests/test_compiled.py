"""The opt-in compiled step of TowerAdam / TowerAdamW (``compiled=True``).

References: torch.optim.Adam / AdamW for the compiled update kernel; a float64 dot product
(common practice) for the compiled read pass; the default path (itself checked against
torch.optim and autograd in test_matches_torch_optim.py and test_hypergradients.py) for the
whole optimizer step; dynamo's own compile counters for "no recompiles".
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import pytest
import torch
from torch import Tensor, nn

from stepsize_tower import TowerAdam, TowerAdamW
from stepsize_tower.bases import compiled as _compiled

# Bit for bit against torch.optim or another path of ours: the reference path (conftest.py).
pytestmark = pytest.mark.usefixtures("reference_path")


@pytest.fixture(scope="module", autouse=True)
def _needs_compiler() -> Iterator[None]:
    if not _compiled.available():
        pytest.skip("torch.compile (inductor with a C++ compiler) is not usable here")
    yield


def _data() -> tuple[Tensor, Tensor]:
    gen = torch.Generator().manual_seed(0)
    return torch.randn(256, 10, generator=gen), torch.randn(256, 1, generator=gen)


def _train(cls: type[TowerAdam], lr: float, steps: int = 30, **kwargs: Any) -> tuple[list[Tensor], TowerAdam]:
    x, y = _data()
    torch.manual_seed(1)
    model = nn.Sequential(nn.Linear(10, 16), nn.Tanh(), nn.Linear(16, 1))
    opt = cls(model.parameters(), lr=lr, **kwargs)
    for s in range(steps):
        idx = (torch.arange(32) + 8 * s) % 256
        opt.zero_grad()
        nn.functional.mse_loss(model(x[idx]), y[idx]).backward()
        opt.step()
    return [p.detach().clone() for p in model.parameters()], opt


@pytest.mark.parametrize(
    ("cls", "kwargs"),
    [
        (TowerAdam, {}),
        (TowerAdamW, {}),
        (TowerAdam, {"weight_decay": 0.01}),
        (TowerAdam, {"maximize": False, "betas": (0.8, 0.99)}),
    ],
)
@pytest.mark.parametrize("lr", [1e-3, 3.0])  # 3.0 takes steps back in the start-up window
def test_compiled_step_matches_default_path(cls: type[TowerAdam], kwargs: dict[str, Any], lr: float) -> None:
    ref_w, ref = _train(cls, lr, **kwargs)
    got_w, got = _train(cls, lr, compiled=True, **kwargs)
    # The two paths round differently in float32 (the compiled trail adds the intended update
    # a·d, the default one w_before - w_after); steps taken back and redone amplify that.
    tol = 1e-4 if lr < 1 else 2e-3
    for a, b in zip(ref_w, got_w, strict=True):
        torch.testing.assert_close(b, a, rtol=tol, atol=tol / 5)
    assert got.retreats() == ref.retreats()
    assert got.step_sizes()[0][0] == pytest.approx(ref.step_sizes()[0][0], rel=tol)
    assert all("update_ema" in got.state[p] for p in got.param_groups[0]["params"])


@pytest.mark.parametrize("decoupled", [False, True])
def test_compiled_update_kernel_matches_torch_optim(decoupled: bool) -> None:
    # Reference: torch.optim.Adam / AdamW (foreach=False) with the same fixed step size.
    torch.manual_seed(3)
    shapes = [(7, 5), (5,), (3, 4, 2)]
    ref = [torch.randn(s, requires_grad=True) for s in shapes]
    ours = [p.detach().clone() for p in ref]
    torch_cls = torch.optim.AdamW if decoupled else torch.optim.Adam
    torch_opt = torch_cls(ref, lr=0.01, betas=(0.9, 0.99), eps=1e-8, weight_decay=0.1, foreach=False)
    m = [torch.zeros_like(p) for p in ours]
    v = [torch.zeros_like(p) for p in ours]
    trail = [torch.zeros_like(p) for p in ours]
    steps = [torch.zeros(()) for _ in ours]
    trail_ref = [torch.zeros_like(p) for p in ours]
    for _ in range(5):
        grads = [torch.randn(s) for s in shapes]
        for p, g in zip(ref, grads, strict=True):
            p.grad = g.clone()
        before = [p.detach().clone() for p in ref]
        torch_opt.step()
        # the trail of updates: E <- (1 - weight) E + weight * (w_before - w_after), weight 0.01 below
        for e, b, p in zip(trail_ref, before, ref, strict=True):
            e.mul_(0.99).add_(b - p.detach(), alpha=0.01)
        torch._foreach_add_(steps, 1)
        a = torch.tensor(0.01, dtype=torch.float64)
        _compiled.adam_trail_update(ours, grads, m, v, trail, steps, a, 0.9, 0.99, 1e-8, 0.1, decoupled, False, 0.01)
    for a_, b in zip(ref, ours, strict=True):
        torch.testing.assert_close(b, a_.detach(), rtol=1e-5, atol=1e-6)
    for st, mine in zip((torch_opt.state[p] for p in ref), m, strict=True):
        torch.testing.assert_close(mine, st["exp_avg"], rtol=1e-5, atol=1e-7)
    for mine, want in zip(trail, trail_ref, strict=True):
        assert want.abs().max() > 1e-5  # the trail moved: the check is not vacuous
        # the reference differences float32 weights: its rounding is ~1e-7 |w| per step, times 0.01
        torch.testing.assert_close(mine, want, rtol=1e-4, atol=1e-8)


def test_compiled_trail_dot_matches_float64_dot() -> None:
    # Reference: the float64 dot product of the float32 values (common practice).
    torch.manual_seed(4)
    grads = [torch.randn(1000), torch.randn(30, 7)]
    trails = [torch.randn(1000), torch.randn(30, 7)]
    want = sum(float(torch.dot(g.double().flatten(), e.double().flatten())) for g, e in zip(grads, trails, strict=True))
    got = _compiled.two_pass_dot(grads, trails)
    assert got.dtype == torch.float64
    assert float(got) == pytest.approx(want, rel=1e-12)


def test_changing_step_sizes_do_not_recompile() -> None:
    # Reference: dynamo's own counter of compiled frames.
    from torch._dynamo.utils import counters

    _train(TowerAdam, 1e-2, steps=14, compiled=True)  # compiled for these shapes (and warmed up)
    before = counters["frames"]["ok"]
    _, opt = _train(TowerAdam, 1e-2, steps=30, compiled=True)  # the step size changes every step
    assert len({round(x, 12) for x in [opt.step_sizes()[0][0], 1e-2]}) == 2  # it did move
    assert counters["frames"]["ok"] == before


def test_without_a_compiler_the_default_path_runs(monkeypatch: pytest.MonkeyPatch) -> None:
    # Reference: the default path, bit for bit.
    monkeypatch.setattr(_compiled, "_available", False)
    ref_w, _ = _train(TowerAdam, 1e-3)
    got_w, _ = _train(TowerAdam, 1e-3, compiled=True)
    for a, b in zip(ref_w, got_w, strict=True):
        assert torch.equal(a, b)


def test_compiled_option_is_validated() -> None:
    with pytest.raises(ValueError, match="compiled"):
        TowerAdam([torch.zeros(2, requires_grad=True)], compiled="yes")  # type: ignore[arg-type]
