"""The one-step-lagged variant of the native kernel (``native="lagged"``): stepsize_tower/bases/lagged.py.

References: torch.dot of the float64 values (common practice) for the dot product taken
inside the update pass; the exact native pass for the update itself (bit for bit); the
optimizer's own skip counter and torch.isfinite for a non-finite gradient. Its quality as a
hypergradient is not judged here.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import pytest
import torch
from torch import Tensor, nn

from stepsize_tower import TowerAdam, TowerAdamW
from stepsize_tower.bases import lagged, native
from stepsize_tower.trail import TRAIL_KEY


@pytest.fixture(scope="module")
def built() -> Iterator[None]:
    if not native.available():
        pytest.skip("the native kernel could not be built here (no C++ compiler or ninja; see the log)")
    yield


def _lists(seed: int, dtype: torch.dtype) -> list[list[Tensor]]:
    gen = torch.Generator().manual_seed(seed)
    shapes = [(300_001,), (40, 3)]  # several blocks, and a tail shorter than a vector
    return [[torch.randn(s, generator=gen, dtype=dtype) for s in shapes] for _ in range(5)]


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
@pytest.mark.parametrize(("decoupled", "wd", "maximize"), [(False, 0.0, False), (False, 0.1, True), (True, 0.1, False)])
def test_update_pass_returns_the_dot_of_the_old_trail(
    built: None, dtype: torch.dtype, decoupled: bool, wd: float, maximize: bool
) -> None:
    # Reference: torch.dot in float64 of g~ and the trail before the update; the update itself
    # equals the pass without the dot product, bit for bit.
    w, g, m, v, e = _lists(0, dtype)
    v = [x.abs() for x in v]
    twin = [[t.clone() for t in lst] for lst in (w, m, v, e)]
    gt = [(-x if maximize else x) + (p * wd if wd and not decoupled else 0) for x, p in zip(g, w, strict=True)]
    want = sum(float(torch.dot(a.double().flatten(), b.double().flatten())) for a, b in zip(gt, e, strict=True))
    args = ([3.0, 3.0], 0.01, 0.9, 0.99, 1e-8, wd, decoupled, maximize, 0.1)
    h = native.adam_trail_update(w, g, m, v, e, *args, with_dot=True)
    assert h is not None and h.dtype == torch.float64
    assert float(h) == pytest.approx(want, rel=1e-12)
    assert native.adam_trail_update(twin[0], g, twin[1], twin[2], twin[3], *args) is None
    for got, ref in zip((w, m, v, e), twin, strict=True):
        assert all(torch.equal(a, b) for a, b in zip(got, ref, strict=True))


def _model_and_data() -> tuple[nn.Module, Tensor, Tensor]:
    gen = torch.Generator().manual_seed(0)
    x, y = torch.randn(256, 10, generator=gen), torch.randn(256, 1, generator=gen)
    torch.manual_seed(1)
    return nn.Sequential(nn.Linear(10, 16), nn.Tanh(), nn.Linear(16, 1)), x, y


def _spy(monkeypatch: pytest.MonkeyPatch, name: str) -> list[int]:
    calls = [0]
    real = getattr(native, name)

    def counted(*args: Any, **kwargs: Any) -> Any:
        calls[0] += 1
        return real(*args, **kwargs)

    monkeypatch.setattr(native, name, counted)
    return calls


@pytest.mark.parametrize("cls", [TowerAdam, TowerAdamW])
def test_each_step_uses_the_dot_taken_in_the_last_update_pass(
    built: None, monkeypatch: pytest.MonkeyPatch, cls: type[TowerAdam]
) -> None:
    # Reference: torch.dot in float64 of g_s and E_{s-1} (snapshotted before step s), compared
    # with what step s+1 is handed; no separate read pass runs once the kept value exists.
    model, x, y = _model_and_data()
    opt = cls(model.parameters(), lr=1e-3, native="lagged")
    params = list(model.parameters())
    read_passes = _spy(monkeypatch, "trail_dot")
    for s in range(15):
        idx = (torch.arange(32) + 8 * s) % 256
        opt.zero_grad()
        nn.functional.mse_loss(model(x[idx]), y[idx]).backward()
        trails = [opt.state[p][TRAIL_KEY].clone() if TRAIL_KEY in opt.state[p] else None for p in params]
        wd = opt.param_groups[0]["weight_decay"] if cls is TowerAdam else 0.0
        want = sum(
            float(torch.dot((p.grad + wd * p.detach()).double().flatten(), t.double().flatten()))
            for p, t in zip(params, trails, strict=True)
            if t is not None
        )
        opt.step()
        kept = lagged.recall(opt.state[params[0]][TRAIL_KEY])
        assert kept is not None
        assert float(kept) == pytest.approx(want, rel=1e-9, abs=1e-30)
    assert opt.retreats() == 0 and read_passes[0] == 0
    assert opt.step_sizes()[0][0] != 1e-3  # the step size moved: the lagged dot product was used


def test_a_non_finite_gradient_is_still_skipped(built: None) -> None:
    # Reference: the optimizer's skip counter; torch.isfinite of the weights.
    model, x, y = _model_and_data()
    opt = TowerAdam(model.parameters(), lr=1e-3, native="lagged")
    for s in range(16):
        idx = (torch.arange(32) + 8 * s) % 256
        opt.zero_grad()
        nn.functional.mse_loss(model(x[idx]), y[idx]).backward()
        if s == 14:  # after the start-up window
            next(iter(model.parameters())).grad[0, 0] = float("inf")
            before = [p.detach().clone() for p in model.parameters()]
        opt.step()
        if s == 14:
            assert all(torch.equal(a, p) for a, p in zip(before, model.parameters(), strict=True))
    assert opt.skipped_steps() == 1
    assert all(torch.isfinite(p).all() for p in model.parameters())


def test_a_trail_written_since_is_not_trusted() -> None:
    # Reference: the trail's own version counter (a retreat clears it in place).
    trail = torch.ones(3)
    lagged.remember(trail, torch.tensor(2.0, dtype=torch.float64))
    assert lagged.recall(trail) is not None
    trail.zero_()
    assert lagged.recall(trail) is None
    assert lagged.recall(torch.ones(3)) is None  # another tensor


def test_native_option_accepts_lagged_only_as_a_string_value() -> None:
    TowerAdam([torch.zeros(2, requires_grad=True)], native="lagged")
    with pytest.raises(ValueError, match=r"native.*'lag'.*lagged"):
        TowerAdam([torch.zeros(2, requires_grad=True)], native="lag")
