"""The native CPU kernel of TowerAdam / TowerAdamW (``native=True``): stepsize_tower/bases/native.py.

References, named beside each check: a float64 Adam step written here with plain torch ops
from the update rule (textbook Adam/AdamW, common practice); torch.optim.Adam / AdamW with
the same fixed step size; torch.dot of the float64 values; the default path of the optimizer
(itself checked against torch.optim and autograd elsewhere). Tests that need the build skip
where no compiler or ninja is present; the fallback tests run everywhere.
"""

from __future__ import annotations

import logging
from collections.abc import Iterator
from typing import Any

import pytest
import torch
from torch import Tensor, nn

from stepsize_tower import TowerAdam, TowerAdamW
from stepsize_tower.bases import compiled, native

SHAPES = [(70, 50), (50,), (3, 4, 2), (1,)]
# float32 tolerance against torch.optim: both round each elementwise operation once, in a
# different order (torch's lerp uses a fused multiply-add): a few ulp of the update, which is
# ~1e-2 of the weights here, so 4 ulp of the weights (2^-21 relative) is ample.
F32_RTOL, F32_ATOL = 2.0**-21, 1e-7
# float64 against the reference written here: the same math, rounded in a different order.
F64_RTOL, F64_ATOL = 1e-13, 1e-15


@pytest.fixture(scope="module")
def built() -> Iterator[None]:
    """The kernel, built once per test session (later sessions load it from torch's cache)."""
    if not native.available():
        pytest.skip("the native kernel could not be built here (no C++ compiler or ninja; see the log)")
    yield


def _tensors(dtype: torch.dtype, seed: int, scale: float = 1.0) -> list[Tensor]:
    gen = torch.Generator().manual_seed(seed)
    return [(torch.randn(s, generator=gen, dtype=torch.float64) * scale).to(dtype) for s in SHAPES]


def _reference_step(
    w: Tensor, g: Tensor, m: Tensor, v: Tensor, e: Tensor, t: int, a: float, hyper: dict[str, Any]
) -> None:
    """Textbook Adam/AdamW with the trail ``E <- (1-ω)E + ωΔ``, Δ the intended update, float64, in place."""
    b1, b2, eps, wd = hyper["beta1"], hyper["beta2"], hyper["eps"], hyper["weight_decay"]
    g = -g if hyper["maximize"] else g
    if wd and not hyper["decoupled"]:
        g = g + wd * w
    m.copy_(b1 * m + (1 - b1) * g)
    v.copy_(b2 * v + (1 - b2) * g * g)
    u = a / (1 - b1**t) * m / ((v / (1 - b2**t)).sqrt() + eps)
    delta = u + a * wd * w if hyper["decoupled"] else u
    w.sub_(delta)
    e.copy_((1 - hyper["trail_weight"]) * e + hyper["trail_weight"] * delta)


HYPERS = [
    {"decoupled": False, "weight_decay": 0.0, "maximize": False},
    {"decoupled": True, "weight_decay": 0.1, "maximize": False},
    {"decoupled": False, "weight_decay": 0.1, "maximize": False},  # L2 decay
    {"decoupled": False, "weight_decay": 0.0, "maximize": True},
]


def _hyper(**kw: Any) -> dict[str, Any]:
    return {"beta1": 0.9, "beta2": 0.99, "eps": 1e-8, "trail_weight": 0.1, **kw}


def _run_native(dtype: torch.dtype, hyper: dict[str, Any], steps: int, a: float = 0.01) -> list[list[Tensor]]:
    """``steps`` native steps from fixed data: ``[w, m, v, E]`` lists."""
    w = _tensors(dtype, 0)
    m, v, e = ([torch.zeros_like(p) for p in w] for _ in range(3))
    for s in range(1, steps + 1):
        g = _tensors(dtype, s, 0.1)
        native.adam_trail_update(
            w, g, m, v, e, [float(s)] * len(w), a, hyper["beta1"], hyper["beta2"], hyper["eps"],
            hyper["weight_decay"], hyper["decoupled"], hyper["maximize"], hyper["trail_weight"],
        )  # fmt: skip
    return [w, m, v, e]


@pytest.mark.parametrize("kw", HYPERS, ids=["adam", "adamw", "l2", "maximize"])
def test_float64_update_equals_textbook_adam_with_trail(built: None, kw: dict[str, Any]) -> None:
    # Reference: the float64 step written above with plain torch ops (textbook Adam/AdamW).
    hyper = _hyper(**kw)
    got = _run_native(torch.float64, hyper, steps=6)
    w = _tensors(torch.float64, 0)
    m, v, e = ([torch.zeros_like(p) for p in w] for _ in range(3))
    for s in range(1, 7):
        for i, g in enumerate(_tensors(torch.float64, s, 0.1)):
            _reference_step(w[i], g, m[i], v[i], e[i], s, 0.01, hyper)
    for mine, want in zip(got, [w, m, v, e], strict=True):
        for x, y in zip(mine, want, strict=True):
            torch.testing.assert_close(x, y, rtol=F64_RTOL, atol=F64_ATOL)
    assert e[0].abs().max() > 1e-4  # the trail moved: the check is not vacuous


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
@pytest.mark.parametrize("kw", HYPERS, ids=["adam", "adamw", "l2", "maximize"])
def test_update_equals_torch_optim(built: None, dtype: torch.dtype, kw: dict[str, Any]) -> None:
    # Reference: torch.optim.Adam / AdamW (single-tensor path) with the same fixed lr.
    hyper = _hyper(**kw)
    got = _run_native(dtype, hyper, steps=5)
    ref = [nn.Parameter(p) for p in _tensors(dtype, 0)]
    cls = torch.optim.AdamW if hyper["decoupled"] else torch.optim.Adam
    opt = cls(ref, lr=0.01, betas=(0.9, 0.99), eps=1e-8, weight_decay=hyper["weight_decay"],
              maximize=hyper["maximize"], foreach=False)  # fmt: skip
    for s in range(1, 6):
        for p, g in zip(ref, _tensors(dtype, s, 0.1), strict=True):
            p.grad = g
        opt.step()
    rtol, atol = (F32_RTOL, F32_ATOL) if dtype == torch.float32 else (F64_RTOL, F64_ATOL)
    for i, p in enumerate(ref):
        torch.testing.assert_close(got[0][i], p.detach(), rtol=rtol, atol=atol)
        torch.testing.assert_close(got[1][i], opt.state[p]["exp_avg"], rtol=rtol, atol=atol)
        torch.testing.assert_close(got[2][i], opt.state[p]["exp_avg_sq"], rtol=rtol, atol=atol**2)


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
@pytest.mark.parametrize("kw", HYPERS, ids=["adam", "adamw", "l2", "maximize"])
def test_trail_dot_equals_float64_dot(built: None, dtype: torch.dtype, kw: dict[str, Any]) -> None:
    # Reference: torch.dot of the float64 values of g~ and E, g~ formed in the tensors' dtype
    # as the kernel does: ±g + (λ w), two roundings (torch's add(alpha=) would fuse them).
    w, g, e = _tensors(dtype, 1), _tensors(dtype, 2), _tensors(dtype, 3)
    w[0] = torch.randn(300_000, dtype=dtype)  # several blocks of 2^15 elements
    g[0], e[0] = torch.randn_like(w[0]), torch.randn_like(w[0])
    l2 = kw["weight_decay"] if not kw["decoupled"] else 0.0
    want = 0.0
    for p, gi, ei in zip(w, g, e, strict=True):
        gt = -gi if kw["maximize"] else gi
        gt = gt + p * l2 if l2 else gt
        want += float(torch.dot(gt.double().flatten(), ei.double().flatten()))
    got = native.trail_dot(g, e, params=w, weight_decay=kw["weight_decay"], decoupled=kw["decoupled"],
                           maximize=kw["maximize"])  # fmt: skip
    assert got.dtype == torch.float64 and got.dim() == 0
    assert float(got) == pytest.approx(want, rel=1e-12, abs=1e-12)


def test_dot_does_not_depend_on_the_thread_count(built: None) -> None:
    # Reference: the same call on one thread, bitwise (block sums added in block order).
    gen = torch.Generator().manual_seed(5)
    g = [torch.randn(1_000_003, generator=gen), torch.randn(77_777, generator=gen)]
    e = [torch.randn(1_000_003, generator=gen) * 1e3, torch.randn(77_777, generator=gen)]
    threads = torch.get_num_threads()
    try:
        results = []
        for n in (1, 2, 3):
            torch.set_num_threads(n)
            results.append(native.trail_dot(g, e))
    finally:
        torch.set_num_threads(threads)
    assert all(torch.equal(r, results[0]) for r in results)
    want = sum(float(torch.dot(a.double(), b.double())) for a, b in zip(g, e, strict=True))
    assert float(results[0]) == pytest.approx(want, rel=1e-12)


def _train(cls: type[TowerAdam], steps: int = 25, dtype: torch.dtype = torch.float32, **kw: Any) -> list[Tensor]:
    gen = torch.Generator().manual_seed(0)
    x, y = torch.randn(256, 10, generator=gen, dtype=dtype), torch.randn(256, 1, generator=gen, dtype=dtype)
    torch.manual_seed(1)
    model = nn.Sequential(nn.Linear(10, 16), nn.Tanh(), nn.Linear(16, 1)).to(dtype)
    opt = cls(model.parameters(), lr=1e-3, **kw)
    for s in range(steps):
        idx = (torch.arange(32) + 8 * s) % 256
        opt.zero_grad()
        nn.functional.mse_loss(model(x[idx]), y[idx]).backward()
        opt.step()
    return [p.detach().clone() for p in model.parameters()]


class _Spy:
    def __init__(self, monkeypatch: pytest.MonkeyPatch) -> None:
        self.calls = 0
        real = native.adam_trail_update

        def counted(*args: Any, **kwargs: Any) -> Any:
            self.calls += 1
            return real(*args, **kwargs)

        monkeypatch.setattr(native, "adam_trail_update", counted)


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
@pytest.mark.parametrize(("cls", "kw"), [(TowerAdam, {}), (TowerAdamW, {}), (TowerAdam, {"weight_decay": 0.01})])
def test_optimizer_with_native_kernel_matches_default_path(
    built: None, monkeypatch: pytest.MonkeyPatch, dtype: torch.dtype, cls: type[TowerAdam], kw: dict[str, Any]
) -> None:
    # Reference: the reference path (native=False). The trail differs by rounding (the kernel adds the intended
    # update a·d, the default path w_before - w_after), and the hypergradient feeds it back.
    ref = _train(cls, dtype=dtype, native=False, **kw)
    spy = _Spy(monkeypatch)
    got = _train(cls, dtype=dtype, native=True, **kw)
    assert spy.calls >= 20  # every step after the first took the kernel
    tol = 1e-5 if dtype == torch.float32 else 1e-12
    for a, b in zip(ref, got, strict=True):
        torch.testing.assert_close(b, a, rtol=tol, atol=tol / 10)


def _disabled(monkeypatch: pytest.MonkeyPatch) -> None:
    """Forget the build for this test (restored afterwards) and turn the kernel off by the switch."""
    monkeypatch.setattr(native, "_module", None)
    monkeypatch.setattr(native, "_decided", False)
    monkeypatch.setenv(native.ENV_SWITCH, "0")


def _notices(caplog: pytest.LogCaptureFixture) -> list[logging.LogRecord]:
    return [r for r in caplog.records if r.name == native.__name__]


def test_switched_off_runs_the_default_path_bitwise_with_one_notice(
    monkeypatch: pytest.MonkeyPatch, caplog: pytest.LogCaptureFixture
) -> None:
    # Reference: the reference path, bit for bit (no build needed: runs everywhere, CI included).
    ref = _train(TowerAdam, native=False)
    _disabled(monkeypatch)
    with caplog.at_level(logging.INFO, logger=native.__name__):
        got = _train(TowerAdam, native=True)
    assert all(torch.equal(a, b) for a, b in zip(ref, got, strict=True))
    notices = _notices(caplog)
    assert len(notices) == 1 and native.ENV_SWITCH in notices[0].getMessage()


def test_a_failed_build_falls_back_with_one_warning(
    monkeypatch: pytest.MonkeyPatch, caplog: pytest.LogCaptureFixture
) -> None:
    # Reference: the reference path, bit for bit; the build is made to fail (no compiler needed).
    from torch.utils import cpp_extension

    def broken(**_: Any) -> None:
        raise RuntimeError("Error building extension: simulated compiler failure")

    ref = _train(TowerAdamW, native=False)
    _disabled(monkeypatch)
    monkeypatch.delenv(native.ENV_SWITCH)
    monkeypatch.setattr(cpp_extension, "load", broken)
    monkeypatch.setattr(native.shutil, "which", lambda name: "/usr/bin/" + name)
    with caplog.at_level(logging.INFO, logger=native.__name__):
        got = _train(TowerAdamW, native=True)
    assert all(torch.equal(a, b) for a, b in zip(ref, got, strict=True))
    notices = _notices(caplog)
    assert len(notices) == 1 and notices[0].levelno == logging.WARNING
    assert "simulated compiler failure" in notices[0].getMessage()


def test_tensors_outside_its_scope_take_the_default_path(built: None, monkeypatch: pytest.MonkeyPatch) -> None:
    # Reference: the reference path, bit for bit, for bfloat16 parameters (not taken by the kernel).
    spy = _Spy(monkeypatch)
    ref = _train(TowerAdam, dtype=torch.bfloat16, native=False)
    got = _train(TowerAdam, dtype=torch.bfloat16, native=True)
    assert spy.calls == 0
    assert all(torch.equal(a, b) for a, b in zip(ref, got, strict=True))
    w = torch.zeros(4)
    assert not native.applies([w], [torch.zeros(5)])  # a gradient of another shape
    assert not native.applies([w], [torch.zeros(4, dtype=torch.float64)])  # mixed dtypes
    assert not native.applies([torch.zeros(4, 4).t()], [torch.zeros(4, 4)])  # not contiguous
    assert not native.applies([w], [])  # lists of different lengths
    assert native.applies([w], [torch.zeros(4)])


def test_the_default_takes_the_kernel_on_cpu_unless_compiled_is_asked_for(
    built: None, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Reference: native=True, bit for bit (the default native=None takes the same kernel);
    # an explicit compiled=True keeps the compiled kernels (common practice: an explicit
    # option wins over a default).
    want = _train(TowerAdam, native=True)
    spy = _Spy(monkeypatch)
    got = _train(TowerAdam)
    assert spy.calls >= 20 and all(torch.equal(a, b) for a, b in zip(want, got, strict=True))
    assert TowerAdam([torch.zeros(2, requires_grad=True)]).param_groups[0]["native"] is None
    spy.calls = 0
    monkeypatch.setattr(compiled, "available", lambda: True)
    monkeypatch.setattr(compiled, "adam_trail_update", lambda *a, **k: None)  # no compile needed
    monkeypatch.setattr(compiled, "two_pass_dot", lambda grads, *a, **k: torch.zeros((), dtype=torch.float64))
    _train(TowerAdam, steps=3, compiled=True)
    assert spy.calls == 0


def test_bad_input_to_the_kernel_raises_a_clear_error(built: None) -> None:
    w, m = [torch.zeros(4)], [torch.zeros(4)]
    args = (0.01, 0.9, 0.99, 1e-8, 0.0, False, False, 0.1)
    with pytest.raises(RuntimeError, match="tensor 0 has 5 elements, expected 4"):
        native.adam_trail_update(w, [torch.zeros(5)], m, m, m, [1.0], *args)
    with pytest.raises(RuntimeError, match="tensor 0 has dtype Double, expected Float"):
        native.adam_trail_update(w, [torch.zeros(4, dtype=torch.float64)], m, m, m, [1.0], *args)
    with pytest.raises(RuntimeError, match="float32 or float64 tensors only"):
        native.trail_dot([torch.zeros(4, dtype=torch.float16)], [torch.zeros(4, dtype=torch.float16)])
    with pytest.raises(RuntimeError, match="differ in length"):
        native.trail_dot([torch.zeros(4)], [])
    with pytest.raises(ValueError, match="L2 weight decay needs params"):
        native.trail_dot([torch.zeros(4)], [torch.zeros(4)], weight_decay=0.1, decoupled=False)


def test_native_option_is_validated() -> None:
    with pytest.raises(ValueError, match="native"):
        TowerAdam([torch.zeros(2, requires_grad=True)], native="yes")  # type: ignore[arg-type]
