"""The lagged trail hypergradient (option ``lagged``, the default): stepsize_tower/lag.py.

References: torch.dot of float64 copies (common practice) of the gradient and the trail as
they were before the step, for the value each update pass keeps and each settled step
learns from; the pass without the dot product, bit for bit, for the kernels' updates;
``torch.abs(...).max()`` for the largest entry; the optimizer's own skip and retreat
counters; an uninterrupted run, bit for bit, for a resumed one. Its quality as a
hypergradient is measured in experiments/ (not judged here).
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from typing import Any

import pytest
import torch
from torch import Tensor, nn

from stepsize_tower import TowerAdam, TowerAdamW, TowerSGD, engine
from stepsize_tower.bases import native
from stepsize_tower.group_state import TOWER_KEY
from stepsize_tower.lag import LAG_KEY
from stepsize_tower.safeguards import RETREAT_WINDOW
from stepsize_tower.tower import TowerOptimizer
from stepsize_tower.trail import TRAIL_KEY


@pytest.fixture(scope="module")
def built() -> Iterator[None]:
    if not native.available():
        pytest.skip("the native kernel could not be built here (no C++ compiler or ninja; see the log)")
    yield


def _lists(seed: int, dtype: torch.dtype, count: int = 5) -> list[list[Tensor]]:
    gen = torch.Generator().manual_seed(seed)
    shapes = [(300_001,), (40, 3)]  # several blocks, and a tail shorter than a vector
    return [[torch.randn(s, generator=gen, dtype=dtype) for s in shapes] for _ in range(count)]


def _dot64(a: list[Tensor], b: list[Tensor]) -> float:
    return sum(float(torch.dot(x.double().flatten(), y.double().flatten())) for x, y in zip(a, b, strict=True))


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
@pytest.mark.parametrize(("decoupled", "wd", "maximize"), [(False, 0.0, False), (False, 0.1, True), (True, 0.1, False)])
def test_adam_update_pass_returns_the_dot_of_the_old_trail(
    built: None, dtype: torch.dtype, decoupled: bool, wd: float, maximize: bool
) -> None:
    w, g, m, v, e = _lists(0, dtype)
    v = [x.abs() for x in v]
    twin = [[t.clone() for t in lst] for lst in (w, m, v, e)]
    gt = [(-x if maximize else x) + (p * wd if wd and not decoupled else 0) for x, p in zip(g, w, strict=True)]
    want = _dot64(gt, e)
    args = ([3.0, 3.0], 0.01, 0.9, 0.99, 1e-8, wd, decoupled, maximize, 0.1)
    h = native.adam_trail_update(w, g, m, v, e, *args, with_dot=True)
    assert h is not None and h.dtype == torch.float64
    assert float(h) == pytest.approx(want, rel=1e-12)
    assert native.adam_trail_update(twin[0], g, twin[1], twin[2], twin[3], *args) is None
    for got, ref in zip((w, m, v, e), twin, strict=True):
        assert all(torch.equal(a, b) for a, b in zip(got, ref, strict=True))


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
@pytest.mark.parametrize(
    ("momentum", "nesterov", "wd", "maximize"),
    [(0.9, False, 0.0, False), (0.9, True, 0.1, True), (0.0, False, 0.1, False)],
)
def test_sgd_update_pass_returns_the_dot_of_the_old_trail(
    built: None, dtype: torch.dtype, momentum: float, nesterov: bool, wd: float, maximize: bool
) -> None:
    w, g, b, e, kept = _lists(1, dtype)
    twin = [[t.clone() for t in lst] for lst in (w, b, e, kept)]
    gt = [(-x if maximize else x) + p * wd for x, p in zip(g, w, strict=True)]
    want = _dot64(gt, e)
    args = (0.01, momentum, 0.0, wd, nesterov, maximize, 0.1)
    h = native.sgd_trail_update(w, g, b, e, kept, *args, with_dot=True)
    assert h is not None and float(h) == pytest.approx(want, rel=1e-12)
    assert native.sgd_trail_update(twin[0], g, twin[1], twin[2], twin[3], *args) is None
    for got, ref in zip((w, b, e, kept), twin, strict=True):
        assert all(torch.equal(a, c) for a, c in zip(got, ref, strict=True))


@pytest.mark.parametrize("bad", [None, float("inf"), float("-inf"), float("nan")])
def test_largest_entry_matches_torch_and_flags_non_finite_entries(built: None, bad: float | None) -> None:
    (g,) = _lists(2, torch.float32, count=1)
    if bad is not None:
        g[0][123_457] = bad
    got = float(native.largest(g))
    want = max(float(x.abs().max()) for x in g)
    assert (got == want) or (got != got and want != want)  # NaN where torch gives NaN


def _model_and_data() -> tuple[nn.Module, Tensor, Tensor]:
    gen = torch.Generator().manual_seed(0)
    x, y = torch.randn(256, 10, generator=gen), torch.randn(256, 1, generator=gen)
    torch.manual_seed(1)
    return nn.Sequential(nn.Linear(10, 16), nn.Tanh(), nn.Linear(16, 1)), x, y


def _backward(model: nn.Module, x: Tensor, y: Tensor, s: int) -> None:
    idx = (torch.arange(32) + 8 * s) % 256
    model.zero_grad()
    nn.functional.mse_loss(model(x[idx]), y[idx]).backward()


MAKERS: dict[str, Callable[[Any], TowerOptimizer]] = {
    "adam-native": lambda p: TowerAdam(p, lr=1e-3),
    "adamw-reference": lambda p: TowerAdamW(p, lr=1e-3, native=False),
    "adam-per-tensor": lambda p: TowerAdam(p, lr=1e-3, granularity="tensor"),
    "sgd-momentum-native": lambda p: TowerSGD(p, lr=1e-2, momentum=0.9, weight_decay=1e-3, lagged=True),
    "sgd-plain-reference": lambda p: TowerSGD(p, lr=1e-2, native=False, lagged=True),
    "sgd-nesterov": lambda p: TowerSGD(p, lr=1e-2, momentum=0.9, nesterov=True, lagged=True),
}


def _loss_grads(opt: TowerOptimizer, params: list[Tensor]) -> list[Tensor]:
    group = opt.param_groups[0]
    wd = group["weight_decay"] if not getattr(opt._rule, "decoupled", False) else 0.0
    return [p.grad + wd * p.detach() for p in params]


def _record_update_dots(monkeypatch: pytest.MonkeyPatch) -> list[Tensor]:
    """The hypergradient each step hands to its levels, recorded through a spy on tower_step."""
    handed: list[Tensor] = []
    real = engine.tower_step

    def spy(ts: Any, levels: Any, update_dot: Tensor, *args: Any, **kwargs: Any) -> Tensor:
        handed.append(update_dot.clone())
        return real(ts, levels, update_dot, *args, **kwargs)

    monkeypatch.setattr(engine, "tower_step", spy)
    return handed


def _trails_before(opt: TowerOptimizer, params: list[Tensor]) -> list[Tensor]:
    """Copies of the trails as they are before the next step (zeros before the first)."""
    return [
        opt.state[p][TRAIL_KEY].clone() if TRAIL_KEY in opt.state.get(p, {}) else torch.zeros_like(p) for p in params
    ]


@pytest.mark.parametrize("name", list(MAKERS))
@pytest.mark.parametrize("masked", [False, True])
def test_each_settled_step_learns_from_the_last_update_pass(
    built: None, monkeypatch: pytest.MonkeyPatch, name: str, masked: bool
) -> None:
    # Reference: torch.dot in float64 of g~_s and E_{s-1} (snapshotted before step s; the reference
    # path multiplies in float32, hence rtol 1e-4), divided by the trail weight; step s+1's levels
    # are handed exactly the kept value.
    monkeypatch.setattr(engine, "MASK_ON_CPU", masked)
    handed = _record_update_dots(monkeypatch)
    model, x, y = _model_and_data()
    opt = MAKERS[name](model.parameters())
    params = list(model.parameters())
    weight = 1 - opt.param_groups[0]["horizon"]
    per_tensor = opt.param_groups[0]["granularity"] == "tensor"
    kept: list[Tensor] = []
    for s in range(RETREAT_WINDOW + 8):
        _backward(model, x, y, s)
        trails = _trails_before(opt, params)
        dots = [_dot64([g], [t]) for g, t in zip(_loss_grads(opt, params), trails, strict=True)]
        opt.step()
        want = torch.tensor(dots if per_tensor else [sum(dots)], dtype=torch.float64) / weight
        assert torch.allclose(opt.param_groups[0][TOWER_KEY][LAG_KEY], want, rtol=1e-4, atol=1e-30)
        kept.append(want)
    assert opt.retreats() == 0 and opt.skipped_steps() == 0
    for s in range(RETREAT_WINDOW + 1, RETREAT_WINDOW + 8):  # settled: the value kept by step s-1
        assert torch.allclose(handed[s], kept[s - 1], rtol=1e-4, atol=1e-30), s


@pytest.mark.parametrize("make", [lambda p: TowerAdam(p, lr=1e-3, lagged=False), lambda p: TowerSGD(p, lr=1e-2)])
def test_exact_option_learns_from_the_current_gradient(monkeypatch: pytest.MonkeyPatch, make: Any) -> None:
    # Reference: torch.dot in float64 of g~_s and E_{s-1}, handed to step s itself.
    handed = _record_update_dots(monkeypatch)
    model, x, y = _model_and_data()
    opt = make(model.parameters())  # TowerSGD: exact by default
    params = list(model.parameters())
    for s in range(RETREAT_WINDOW + 5):
        _backward(model, x, y, s)
        trails = _trails_before(opt, params)
        want = _dot64(_loss_grads(opt, params), trails) / (1 - opt.param_groups[0]["horizon"])
        opt.step()
        assert float(handed[-1]) == pytest.approx(want, rel=1e-4, abs=1e-30)
    assert LAG_KEY not in opt.param_groups[0][TOWER_KEY]


@pytest.mark.parametrize("masked", [False, True])
@pytest.mark.parametrize("cls", [TowerAdam, TowerSGD])
def test_a_skipped_step_changes_nothing_and_keeps_the_value(
    built: None, monkeypatch: pytest.MonkeyPatch, masked: bool, cls: type[TowerOptimizer]
) -> None:
    # Reference: the optimizer's skip counter; torch.equal of weights, state and kept value.
    monkeypatch.setattr(engine, "MASK_ON_CPU", masked)
    model, x, y = _model_and_data()
    opt = cls(model.parameters(), lr=1e-3, lagged=True)
    bad_step = RETREAT_WINDOW + 4
    for s in range(bad_step + 3):
        _backward(model, x, y, s)
        if s == bad_step:
            next(iter(model.parameters())).grad[0, 0] = float("nan")
            before = [p.detach().clone() for p in model.parameters()]
            value = opt.param_groups[0][TOWER_KEY][LAG_KEY].clone()
        opt.step()
        if s == bad_step:
            assert all(torch.equal(a, p) for a, p in zip(before, model.parameters(), strict=True))
            assert torch.equal(opt.param_groups[0][TOWER_KEY][LAG_KEY], value)
    assert opt.skipped_steps() == 1
    assert all(torch.isfinite(p).all() for p in model.parameters())


@pytest.mark.parametrize("masked", [False, True])
def test_a_retreat_after_the_window_restarts_the_value_with_the_trail(
    built: None, monkeypatch: pytest.MonkeyPatch, masked: bool
) -> None:
    # Reference: the retreat counter, and the exact hypergradient against a cleared trail (0).
    monkeypatch.setattr(engine, "MASK_ON_CPU", masked)
    model, x, y = _model_and_data()
    opt = TowerSGD(model.parameters(), lr=1e-2, momentum=0.9, lagged=True)
    blowup = RETREAT_WINDOW + 4
    for s in range(blowup + 1):
        _backward(model, x, y, s)
        if s == blowup:  # SGD's blow-up guard: the largest entry grows far past its peak
            for p in model.parameters():
                p.grad.mul_(1e4)
        opt.step()
    assert opt.retreats() == 1
    assert torch.equal(opt.param_groups[0][TOWER_KEY][LAG_KEY], torch.zeros(1, dtype=torch.float64))
    assert all(float(opt.state[p][TRAIL_KEY].abs().max()) == 0 for p in model.parameters())


@pytest.mark.parametrize("cls", [TowerAdam, TowerSGD])
def test_a_resumed_run_continues_bit_for_bit(built: None, cls: type[TowerOptimizer]) -> None:
    # Reference: the same run, uninterrupted (the kept value travels in state_dict()).
    def run(resume_at: int | None) -> list[Tensor]:
        model, x, y = _model_and_data()
        opt = cls(model.parameters(), lr=1e-3, lagged=True)
        for s in range(RETREAT_WINDOW + 10):
            if s == resume_at:
                saved = opt.state_dict()
                opt = cls(model.parameters(), lr=1e-3, lagged=True)
                opt.load_state_dict(saved)
            _backward(model, x, y, s)
            opt.step()
        return [p.detach().clone() for p in model.parameters()]

    straight, resumed = run(None), run(RETREAT_WINDOW + 3)
    assert all(torch.equal(a, b) for a, b in zip(straight, resumed, strict=True))


def test_defaults_are_lagged_for_adam_and_exact_for_sgd() -> None:
    # Reference: the measured defaults (experiments/README.md, session 14).
    w = [torch.zeros(2, requires_grad=True)]
    assert TowerAdam(w).defaults["lagged"] and TowerAdamW(w).defaults["lagged"]
    assert not TowerSGD(w, lr=0.1).defaults["lagged"]


def test_a_checkpoint_from_before_the_option_resumes_exact() -> None:
    # Reference: the option's legacy value (a run saved before it existed learned exactly).
    model, _, _ = _model_and_data()
    opt = TowerAdam(model.parameters(), lr=1e-3)
    saved = opt.state_dict()
    for group in saved["param_groups"]:
        del group["lagged"]
    opt.load_state_dict(saved)
    assert opt.param_groups[0]["lagged"] is False


def test_lagged_must_be_a_bool() -> None:
    with pytest.raises(ValueError, match=r"Invalid lagged: 'yes'; expected True or False"):
        TowerAdam([torch.zeros(2, requires_grad=True)], lagged="yes")  # type: ignore[arg-type]


def test_native_still_accepts_its_older_lagged_spelling() -> None:
    TowerAdam([torch.zeros(2, requires_grad=True)], native="lagged")
    with pytest.raises(ValueError, match=r"Invalid native: 'lag'"):
        TowerAdam([torch.zeros(2, requires_grad=True)], native="lag")


@pytest.mark.parametrize("cls", [TowerAdam, TowerSGD])
def test_settled_native_steps_take_no_read_pass_of_the_trail(
    built: None, monkeypatch: pytest.MonkeyPatch, cls: type[TowerOptimizer]
) -> None:
    # Reference: spies on the native read passes (common practice): after the start-up window
    # the dot product comes from the update pass; only the gradients are read first (finiteness,
    # or SGD's largest entry).
    calls: dict[str, int] = {"trail_dot": 0, "dot_and_max": 0, "all_finite": 0, "largest": 0}
    for name in calls:
        real = getattr(native, name)

        def counted(*args: Any, _name: str = name, _real: Any = real, **kwargs: Any) -> Any:
            calls[_name] += 1
            return _real(*args, **kwargs)

        monkeypatch.setattr(native, name, counted)
    model, x, y = _model_and_data()
    opt = (
        cls(model.parameters(), lr=1e-3, momentum=0.9, lagged=True)
        if cls is TowerSGD
        else cls(model.parameters(), lr=1e-3)
    )
    for s in range(RETREAT_WINDOW + 1):
        _backward(model, x, y, s)
        opt.step()
    calls.update(dict.fromkeys(calls, 0))
    for s in range(RETREAT_WINDOW + 1, RETREAT_WINDOW + 11):
        _backward(model, x, y, s)
        opt.step()
    assert calls["trail_dot"] == calls["dot_and_max"] == 0
    assert calls["all_finite" if cls is TowerAdam else "largest"] == 10


def test_turning_the_lag_off_and_on_again_starts_from_an_exact_step(monkeypatch: pytest.MonkeyPatch) -> None:
    # Reference: the exact hypergradient (torch.dot in float64 of g~_s and E_{s-1}): a value kept
    # before the lag was turned off is not used once it is turned on again.
    handed = _record_update_dots(monkeypatch)
    model, x, y = _model_and_data()
    opt = TowerAdam(model.parameters(), lr=1e-3)
    params = list(model.parameters())
    for s in range(RETREAT_WINDOW + 6):
        opt.param_groups[0]["lagged"] = s < RETREAT_WINDOW + 2 or s >= RETREAT_WINDOW + 4
        _backward(model, x, y, s)
        trails = _trails_before(opt, params)
        want = _dot64(_loss_grads(opt, params), trails) / (1 - opt.param_groups[0]["horizon"])
        opt.step()
        if s == RETREAT_WINDOW + 4:  # turned on again: no kept value yet, so this step is exact
            assert float(handed[-1]) == pytest.approx(want, rel=1e-9, abs=1e-30)
        if s == RETREAT_WINDOW + 5:  # and the next one lags again
            assert float(handed[-1]) != pytest.approx(want, rel=1e-3)
