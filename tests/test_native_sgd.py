"""TowerSGD's native kernels (``dot_and_max``, ``sgd_trail_update``): stepsize_tower/bases/native.py.

A settled step needs a hypergradient (``<g̃_s, buf>`` at horizon 0 with momentum, ``<g̃_s, E>``
against the trail otherwise) and ``max |g_s|`` (the blow-up guard): one read pass. With a
trail, the update (weights, momentum buffer, trail, kept gradient) is one more pass.
References, named beside each check: torch.dot and torch.max of the float64 values;
``torch.optim.SGD``'s update rule written here in float64 (its documented rule, common
practice) and torch.optim.SGD itself; the reference path of the optimizer (``native=False``,
itself checked against torch.optim and autograd elsewhere).
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
    # default: heavy ball with the one-step hypergradient against its buffer (the trail tests pass horizon)
    kw = {"horizon": 0.0, "momentum": 0.9, **kw}
    opt = TowerSGD(model.parameters(), lr=lr, **kw)
    for s in range(steps):
        idx = (torch.arange(32) + 8 * s) % 256
        opt.zero_grad()
        nn.functional.mse_loss(model(x[idx]), y[idx]).backward()
        opt.step()
    return [p.detach().clone() for p in model.parameters()], opt.step_sizes(), opt.retreats()


class _Spy:
    """Counts the calls of the named native kernels (``calls``: all of them; ``counts``: by name)."""

    def __init__(self, monkeypatch: pytest.MonkeyPatch, *names: str) -> None:
        self.counts = dict.fromkeys(names or ("dot_and_max",), 0)
        for name in self.counts:
            monkeypatch.setattr(native, name, self._counted(name, getattr(native, name)))

    def _counted(self, name: str, real: Any) -> Any:
        def counted(*args: Any, **kwargs: Any) -> Any:
            self.counts[name] += 1
            return real(*args, **kwargs)

        return counted

    @property
    def calls(self) -> int:
        return sum(self.counts.values())


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


# ---------------------------------------------------------------- the update with the trail

SGD_CASES = [
    {"momentum": 0.9, "dampening": 0.0, "nesterov": False, "weight_decay": 0.0, "maximize": False},
    {"momentum": 0.9, "dampening": 0.1, "nesterov": False, "weight_decay": 0.01, "maximize": True},
    {"momentum": 0.8, "dampening": 0.0, "nesterov": True, "weight_decay": 0.01, "maximize": False},
    {"momentum": 0.0, "dampening": 0.0, "nesterov": False, "weight_decay": 0.01, "maximize": False},
]
SGD_IDS = ["heavy_ball", "dampened_l2_maximize", "nesterov_l2", "plain_l2"]


def _sgd_state(dtype: torch.dtype) -> dict[str, list[Tensor]]:
    g, buf, w = _lists(dtype)
    return {
        "w": w,
        "g": g,
        "buf": buf,
        "trail": [b.flip(0) * 0.1 for b in buf],
        "kept": [torch.zeros_like(x) for x in w],
    }


def _run_kernel(st: dict[str, list[Tensor]], a: float, weight: float, hyper: dict[str, Any]) -> None:
    native.sgd_trail_update(
        st["w"], st["g"], st["buf"] if hyper["momentum"] else [], st["trail"],
        st["kept"] if hyper["momentum"] == 0 or hyper["nesterov"] else [], a, hyper["momentum"],
        hyper["dampening"], hyper["weight_decay"], hyper["nesterov"], hyper["maximize"], weight,
    )  # fmt: skip


@pytest.mark.parametrize("hyper", SGD_CASES, ids=SGD_IDS)
def test_float64_update_equals_the_sgd_rule_with_trail(built: None, hyper: dict[str, Any]) -> None:
    # Reference: torch.optim.SGD's documented update (common practice) written here in float64, with the
    # trail E <- (1-ω)E + ω a d; the same math rounded in a possibly different order.
    a, weight = 0.03, 0.01
    st = _sgd_state(torch.float64)
    want = {k: [x.clone() for x in v] for k, v in st.items()}
    _run_kernel(st, a, weight, hyper)
    mu = hyper["momentum"]
    for i, w in enumerate(want["w"]):
        g = -want["g"][i] if hyper["maximize"] else want["g"][i]
        g = g + hyper["weight_decay"] * w
        d = g
        if mu:
            want["buf"][i] = mu * want["buf"][i] + (1 - hyper["dampening"]) * g
            d = g + mu * want["buf"][i] if hyper["nesterov"] else want["buf"][i]
        want["trail"][i] = (1 - weight) * want["trail"][i] + weight * a * d
        want["w"][i] = w - a * d
        if mu == 0 or hyper["nesterov"]:
            want["kept"][i] = g
    for key in ("w", "buf", "trail", "kept"):
        for got_t, want_t in zip(st[key], want[key], strict=True):
            torch.testing.assert_close(got_t, want_t, rtol=1e-13, atol=1e-15)


@pytest.mark.parametrize("hyper", SGD_CASES, ids=SGD_IDS)
def test_float32_update_equals_torch_optim_sgd(built: None, hyper: dict[str, Any]) -> None:
    # Reference: torch.optim.SGD (foreach=False) taking one step from the same buffer at lr = a: weights and
    # buffers within a few float32 ulp (each operation rounded once, possibly in another order).
    a = 0.03
    st = _sgd_state(torch.float32)
    params = [nn.Parameter(w.clone()) for w in st["w"]]
    ref = torch.optim.SGD(params, lr=a, foreach=False, **hyper)
    for p, g, b in zip(params, st["g"], st["buf"], strict=True):
        p.grad = g.clone()
        if hyper["momentum"]:
            ref.state[p]["momentum_buffer"] = b.clone()
    ref.step()
    _run_kernel(st, a, 0.01, hyper)
    for p, w in zip(params, st["w"], strict=True):
        torch.testing.assert_close(w, p.detach(), rtol=2.0**-21, atol=1e-7)
    if hyper["momentum"]:
        for p, b in zip(params, st["buf"], strict=True):
            torch.testing.assert_close(b, ref.state[p]["momentum_buffer"], rtol=2.0**-21, atol=1e-7)


TRAIL_KERNELS = ("sgd_trail_update", "dot_and_max")


def _train_trail(lr: float, **kw: Any) -> tuple[list[Tensor], list[list[float]], int]:
    """:func:`_train` with a trail (``horizon=0.99``); ``momentum`` from ``kw`` (default 0, plain SGD)."""
    return _train(lr, **{"horizon": 0.99, "momentum": 0.0, **kw})


@pytest.mark.parametrize(
    "kw",
    [
        {"lr": 1e-3, "momentum": 0.9},
        {"lr": 1e-3, "momentum": 0.9, "nesterov": True, "weight_decay": 1e-2},
        {"lr": 1e-2, "weight_decay": 1e-2, "maximize": False},
        {"lr": 30.0, "momentum": 0.9},
    ],
    ids=["heavy_ball", "nesterov_l2", "plain_l2", "blowup_retreats"],
)
def test_sgd_with_a_trail_takes_the_kernels_and_matches_the_reference_path(
    built: None, monkeypatch: pytest.MonkeyPatch, kw: dict[str, Any]
) -> None:
    # Reference: the reference path (native=False: torch's SGD update, then the trail's two passes). The trail
    # differs by rounding (the kernel adds the intended update a·d), and the hypergradient feeds it back.
    ref_w, ref_a, ref_back = _train_trail(native=False, **kw)
    spy = _Spy(monkeypatch, *TRAIL_KERNELS)
    got_w, got_a, got_back = _train_trail(**kw)
    assert min(spy.counts.values()) >= 40  # every settled step takes both
    assert got_back == ref_back and (kw["lr"] < 1 or got_back > 0)
    assert got_a[0][0] == pytest.approx(ref_a[0][0], rel=1e-4)
    for a, b in zip(ref_w, got_w, strict=True):
        torch.testing.assert_close(b, a, rtol=1e-4, atol=1e-6)


@pytest.mark.parametrize("kw", [{"native": False}, {"learn_momentum": True}])
def test_trail_kernels_stay_off_where_they_do_not_apply(
    built: None, monkeypatch: pytest.MonkeyPatch, kw: dict[str, Any]
) -> None:
    # Reference: the spy itself (common practice): switched off, or with a learned momentum, nothing calls them.
    spy = _Spy(monkeypatch, *TRAIL_KERNELS)
    _train_trail(1e-3, momentum=0.9, **kw)
    assert spy.calls == 0
