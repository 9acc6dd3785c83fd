"""TowerSGD's native read pass (``dot_and_max``): stepsize_tower/bases/native.py.

With momentum (heavy ball), a settled step needs ``<g̃_s, buf>`` (its hypergradient) and
``max |g_s|`` (the blow-up guard); the kernel takes both in one read pass. References, named
beside each check: torch.dot and torch.max of the float64 values; the reference path of the
optimizer (``native=False``, itself checked against torch.optim and autograd elsewhere).
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import pytest
import torch
from torch import Tensor, nn

from stepsize_tower import TowerSGD
from stepsize_tower.bases import native


@pytest.fixture(scope="module")
def built() -> Iterator[None]:
    if not native.available():
        pytest.skip("the native kernel could not be built here (no C++ compiler or ninja; see the log)")
    yield


def _lists(dtype: torch.dtype) -> tuple[list[Tensor], list[Tensor], list[Tensor]]:
    gen = torch.Generator().manual_seed(3)
    shapes = [(300, 117), (117,), (5,), (1,)]  # blocks, vector tails, a single element

    def make(scale: float) -> list[Tensor]:
        return [torch.randn(s, generator=gen, dtype=dtype) * scale for s in shapes]

    return make(1.0), make(0.5), make(2.0)


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
@pytest.mark.parametrize(("weight_decay", "maximize"), [(0.0, False), (0.1, False), (0.1, True)])
def test_dot_and_max_equal_float64_sums(built: None, dtype: torch.dtype, weight_decay: float, maximize: bool) -> None:
    # Reference: torch.dot and max of the float64 values (g̃ = ±g + λw rounded once in dtype,
    # as the optimizer's own loss gradient; the products are exact in float64).
    g, buf, w = _lists(dtype)
    dot, largest = native.dot_and_max(g, buf, params=w, weight_decay=weight_decay, maximize=maximize)
    want = 0.0
    for gi, bi, wi in zip(g, buf, w, strict=True):
        gt = (-gi if maximize else gi) + weight_decay * wi if weight_decay else (-gi if maximize else gi)
        want += float(torch.dot(gt.double().flatten(), bi.double().flatten()))
    assert float(dot) == pytest.approx(want, rel=1e-12)
    assert float(largest) == max(float(gi.abs().max()) for gi in g)  # exact: a maximum rounds nothing


@pytest.mark.parametrize(("bad", "want"), [(float("nan"), "nan"), (float("inf"), "inf"), (-float("inf"), "inf")])
def test_a_non_finite_entry_shows_in_both_results(built: None, bad: float, want: str) -> None:
    # Reference: IEEE arithmetic (common practice): NaN propagates, |±inf| = inf, inf * x is ±inf or NaN.
    g, buf, _ = _lists(torch.float32)
    g[0][7, 3] = bad
    dot, largest = native.dot_and_max(g, buf)
    assert not torch.isfinite(dot)
    assert (torch.isnan(largest) if want == "nan" else torch.isinf(largest)).item()


def _train(lr: float, steps: int = 60, **kw: Any) -> tuple[list[Tensor], list[list[float]], int]:
    gen = torch.Generator().manual_seed(0)
    x, y = torch.randn(256, 10, generator=gen), torch.randn(256, 1, generator=gen)
    torch.manual_seed(1)
    model = nn.Sequential(nn.Linear(10, 32), nn.Tanh(), nn.Linear(32, 1))
    opt = TowerSGD(model.parameters(), lr=lr, momentum=0.9, **kw)
    for s in range(steps):
        idx = (torch.arange(32) + 8 * s) % 256
        opt.zero_grad()
        nn.functional.mse_loss(model(x[idx]), y[idx]).backward()
        opt.step()
    return [p.detach().clone() for p in model.parameters()], opt.step_sizes(), opt.retreats()


class _Spy:
    def __init__(self, monkeypatch: pytest.MonkeyPatch) -> None:
        self.calls = 0
        real = native.dot_and_max

        def counted(*args: Any, **kwargs: Any) -> tuple[Tensor, Tensor]:
            self.calls += 1
            return real(*args, **kwargs)

        monkeypatch.setattr(native, "dot_and_max", counted)


@pytest.mark.parametrize(("lr", "kw"), [(1e-3, {}), (1e-3, {"weight_decay": 1e-2, "dampening": 0.1}), (30.0, {})])
def test_momentum_sgd_takes_the_pass_and_matches_the_reference_path(
    built: None, monkeypatch: pytest.MonkeyPatch, lr: float, kw: dict[str, Any]
) -> None:
    # Reference: the reference path (native=False); the dot product differs by rounding only,
    # and typed 30 the blow-up guard takes the same steps back on both.
    ref_w, ref_a, ref_back = _train(lr, native=False, **kw)
    spy = _Spy(monkeypatch)
    got_w, got_a, got_back = _train(lr, **kw)
    assert spy.calls >= 40  # every settled step
    assert got_back == ref_back and (lr < 1 or got_back > 0)
    assert got_a[0][0] == pytest.approx(ref_a[0][0], rel=1e-5)
    for a, b in zip(ref_w, got_w, strict=True):
        torch.testing.assert_close(b, a, rtol=1e-4, atol=1e-6)


@pytest.mark.parametrize("kw", [{"native": False}, {"nesterov": True}, {"learn_momentum": True}])
def test_other_configurations_keep_the_reference_pass(built: None, monkeypatch: pytest.MonkeyPatch, kw: dict) -> None:
    # Reference: the spy itself (common practice): these never call the kernel.
    spy = _Spy(monkeypatch)
    _train(1e-3, steps=20, **kw)
    assert spy.calls == 0


def test_native_option_is_validated_for_sgd() -> None:
    with pytest.raises(ValueError, match=r"native.*'lagged'.*True or False"):
        TowerSGD([torch.zeros(2, requires_grad=True)], momentum=0.9, native="lagged")  # type: ignore[arg-type]
