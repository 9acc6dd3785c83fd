"""The drop-in contract, table-driven: every public class x {depth 0, defaults, depth 2} x dtype.

In the style of torch.optim's own optimizer tests (``OptimizerInfo`` in
``torch/testing/_internal/common_optimizers.py``): one table, :data:`CASES`, and generic
tests parametrized over it. The reference in every test is ``torch.optim`` itself: the
same class at the same settings (``torch.optim.SGD`` / ``Adam`` / ``AdamW``) where the
numbers must agree (depth 0), and torch.optim's documented behaviour (closure, ``grad is
None``, ``zero_grad``, ``state_dict``, ``maximize``, schedulers) where a learned step size
makes the numbers differ by design (defaults, depth 2).

Only the public API is used: the classes, ``step_sizes()``, ``step_size_tensors()``,
``state_dict()`` and the optimizer's ``state`` / ``param_groups``.
"""

from __future__ import annotations

import copy
import io
import pickle
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import pytest
import torch
from torch import Tensor
from torch.optim import Optimizer
from torch.optim.lr_scheduler import LambdaLR

from stepsize_tower import TowerAdam, TowerAdamW, TowerSGD


@dataclass(frozen=True)
class ClassInfo:
    """One public class at one base setting, with its torch.optim counterpart."""

    name: str
    cls: type[Optimizer]
    reference: type[Optimizer]
    kwargs: dict[str, Any] = field(default_factory=dict)


CLASSES = [
    ClassInfo("sgd", TowerSGD, torch.optim.SGD, {"lr": 0.05}),
    ClassInfo("sgd_momentum", TowerSGD, torch.optim.SGD, {"lr": 0.05, "momentum": 0.9}),
    ClassInfo("sgd_nesterov", TowerSGD, torch.optim.SGD, {"lr": 0.05, "momentum": 0.9, "nesterov": True}),
    ClassInfo("adam", TowerAdam, torch.optim.Adam, {"lr": 0.01}),
    ClassInfo("adamw", TowerAdamW, torch.optim.AdamW, {"lr": 0.01}),
]

#: Tower settings: none (the fixed-rate optimizer), the defaults, two default levels.
TOWERS: dict[str, dict[str, Any]] = {"depth0": {"depth": 0}, "defaults": {}, "depth2": {"depth": 2}}

DTYPES = {"f32": torch.float32, "f64": torch.float64, "bf16": torch.bfloat16}
SIXTEEN_BIT = (torch.bfloat16, torch.float16)


@dataclass(frozen=True)
class Case:
    info: ClassInfo
    tower: str
    dtype: torch.dtype

    @property
    def id(self) -> str:
        return f"{self.info.name}-{self.tower}-{next(k for k, v in DTYPES.items() if v == self.dtype)}"

    @property
    def depth0(self) -> bool:
        return self.tower == "depth0"

    def make(self, params: Any, **extra: Any) -> Optimizer:
        kwargs = {**self.info.kwargs, **TOWERS[self.tower]}
        return self.info.cls(params, **{**kwargs, **extra})

    def make_reference(self, params: Any, **extra: Any) -> Optimizer:
        """torch.optim's class at the same settings (no tower arguments)."""
        return self.info.reference(params, **{**self.info.kwargs, **extra})


CASES = [Case(info, tower, dtype) for info in CLASSES for tower in TOWERS for dtype in DTYPES.values()]


def over(cases: list[Case], slow_unless: Callable[[Case], bool] = lambda c: True) -> Any:
    """Parametrize over ``cases``; those failing ``slow_unless`` are marked slow (full table: ``-m slow``)."""
    params = [pytest.param(c, id=c.id, marks=[] if slow_unless(c) else [pytest.mark.slow]) for c in cases]
    return pytest.mark.parametrize("case", params)


ALL = over(CASES)
#: Behaviours that do not depend on the dtype: float32 in the default run, the rest with -m slow.
ALL_F32 = over(CASES, lambda c: c.dtype == torch.float32)
#: Behaviours where 16-bit storage matters: float32 and bfloat16 in the default run.
ALL_F32_BF16 = over(CASES, lambda c: c.dtype != torch.float64)
DEPTH0 = over([c for c in CASES if c.depth0])

# ---------------------------------------------------------------------------- helpers

SHAPES = [(5, 4), (4,), (3, 5)]
STEPS = 6


def make_params(dtype: torch.dtype, seed: int = 0) -> list[Tensor]:
    gen = torch.Generator().manual_seed(seed)
    return [torch.randn(s, generator=gen, dtype=torch.float64).to(dtype).requires_grad_() for s in SHAPES]


def gradient(step: int, i: int, shape: torch.Size, dtype: torch.dtype) -> Tensor:
    """A fixed pseudo-random gradient for tensor ``i`` at ``step``, built in float64 then cast."""
    gen = torch.Generator().manual_seed(1000 * step + i)
    return torch.randn(shape, generator=gen, dtype=torch.float64).to(dtype)


def run(opt: Optimizer, params: list[Tensor], steps: range) -> None:
    for s in steps:
        for i, p in enumerate(params):
            p.grad = gradient(s, i, p.shape, p.dtype)
        opt.step()


def assert_same_state(a: Optimizer, b: Optimizer) -> None:
    """Bitwise equality of parameters' state and of every group's learned step sizes."""
    pa = [p for g in a.param_groups for p in g["params"]]
    pb = [p for g in b.param_groups for p in g["params"]]
    for x, y in zip(pa, pb, strict=True):
        sa, sb = a.state.get(x, {}), b.state.get(y, {})
        assert sa.keys() == sb.keys()
        for k in sa:
            assert torch.equal(torch.as_tensor(sa[k]), torch.as_tensor(sb[k])), k
    for ta, tb in zip(a.step_size_tensors(), b.step_size_tensors(), strict=True):  # type: ignore[attr-defined]
        assert torch.equal(ta, tb)


def assert_equal_tensors(a: list[Tensor], b: list[Tensor]) -> None:
    for x, y in zip(a, b, strict=True):
        assert x.dtype == y.dtype
        assert torch.equal(x, y), (x - y).abs().max()


def roundtrip(obj: Any) -> Any:
    buffer = io.BytesIO()
    torch.save(obj, buffer)
    buffer.seek(0)
    return torch.load(buffer, weights_only=True)


# ---------------------------------------------------------------------------- depth 0 == torch.optim


def _for_loop_cases() -> list[Any]:
    out = []
    for c in CASES:
        if not c.depth0:
            continue
        out.append(pytest.param(c, id=c.id))
    return out


@pytest.mark.parametrize("case", _for_loop_cases())
def test_depth0_for_loop_path_equals_torch_optim_for_loop_bitwise(case: Case) -> None:
    # reference: torch.optim.SGD/Adam/AdamW(foreach=False), the single-tensor for-loop implementation
    _assert_depth0_matches(case, {"fused": False}, {"foreach": False})


@pytest.mark.parametrize(
    "case", [c for c in CASES if c.depth0 and not (c.info.cls is TowerSGD and c.dtype in SIXTEEN_BIT)]
)
def test_depth0_fused_path_equals_torch_optim_fused_bitwise(case: Case) -> None:
    # reference: torch.optim.SGD/Adam/AdamW(fused=True), torch's fused CPU kernel
    _assert_depth0_matches(case, {"fused": True}, {"fused": True})


def _assert_depth0_matches(case: Case, ours_kw: dict[str, Any], ref_kw: dict[str, Any]) -> None:
    ours, ref = make_params(case.dtype), make_params(case.dtype)
    opt, ref_opt = case.make(ours, **ours_kw), case.make_reference(ref, **ref_kw)
    run(opt, ours, range(STEPS))
    run(ref_opt, ref, range(STEPS))
    assert_equal_tensors(ours, ref)
    for p, q in zip(ours, ref, strict=True):
        assert opt.state[p].keys() == ref_opt.state[q].keys()
        for k in opt.state[p]:
            assert torch.equal(opt.state[p][k], ref_opt.state[q][k]), k


@pytest.mark.parametrize(
    "cls",
    [
        pytest.param(TowerSGD, id="sgd"),
        pytest.param(TowerAdam, id="adam"),
        pytest.param(TowerAdamW, id="adamw"),
    ],
)
def test_depth0_default_lr_is_torch_optims(cls: type[Optimizer]) -> None:
    # reference: torch.optim's default lr (SGD 1e-3, Adam 1e-3, AdamW 1e-3)
    ref = {TowerSGD: torch.optim.SGD, TowerAdam: torch.optim.Adam, TowerAdamW: torch.optim.AdamW}[cls]
    assert cls(make_params(torch.float64), depth=0).defaults["lr"] == ref(make_params(torch.float64)).defaults["lr"]


def with_known_defects(cases: list[Case], defects: dict[str, str]) -> Any:
    """Parametrize over ``cases``; a case whose id starts with a key of ``defects`` is a strict xfail."""
    params = []
    for c in cases:
        reason = next((r for k, r in defects.items() if c.id.startswith(k)), None)
        marks = [pytest.mark.xfail(strict=True, raises=AssertionError, reason=reason)] if reason else []
        params.append(pytest.param(c, id=c.id, marks=marks))
    return pytest.mark.parametrize("case", params)


@with_known_defects(
    [c for c in CASES if c.depth0],
    {},
)
def test_depth0_with_every_default_equals_torch_optim(case: Case) -> None:
    # reference: torch.optim at its own defaults (lr, fused and foreach left unset) on the same data
    ours, ref = make_params(case.dtype), make_params(case.dtype)
    base_kw = {k: v for k, v in case.info.kwargs.items() if k != "lr"}
    opt = case.info.cls(ours, depth=0, **base_kw)
    ref_opt = case.info.reference(ref, **base_kw)
    run(opt, ours, range(STEPS))
    run(ref_opt, ref, range(STEPS))
    assert_equal_tensors(ours, ref)


# ---------------------------------------------------------------------------- state


@ALL_F32_BF16
def test_state_dict_round_trip_resumes_identically(case: Case) -> None:
    # reference: torch.optim's contract: state_dict / load_state_dict (through torch.save and
    # torch.load(weights_only=True)) continue exactly as the uninterrupted run
    straight = make_params(case.dtype)
    opt_straight = case.make(straight)
    run(opt_straight, straight, range(2 * STEPS))

    first = make_params(case.dtype)
    opt_first = case.make(first)
    run(opt_first, first, range(STEPS))
    saved = roundtrip({"params": [p.detach() for p in first], "optim": opt_first.state_dict()})
    resumed = [p.clone().requires_grad_() for p in saved["params"]]
    opt_resumed = case.make(resumed)
    opt_resumed.load_state_dict(saved["optim"])
    assert_same_state(opt_first, opt_resumed)
    run(opt_resumed, resumed, range(STEPS, 2 * STEPS))
    assert_equal_tensors(resumed, straight)
    assert_same_state(opt_resumed, opt_straight)


@ALL_F32
@pytest.mark.parametrize("how", ["deepcopy", "pickle"])
def test_copy_continues_identically(case: Case, how: str) -> None:
    # reference: torch.optim optimizers survive copy.deepcopy and pickle (Optimizer.__getstate__)
    params = make_params(case.dtype)
    opt = case.make(params)
    run(opt, params, range(STEPS))
    copier = copy.deepcopy if how == "deepcopy" else (lambda x: pickle.loads(pickle.dumps(x)))
    params2, opt2 = copier((params, opt))
    assert type(opt2) is type(opt)
    assert_same_state(opt, opt2)
    run(opt, params, range(STEPS, STEPS + 3))
    run(opt2, params2, range(STEPS, STEPS + 3))
    assert_equal_tensors([p.detach() for p in params2], [p.detach() for p in params])
    assert_same_state(opt, opt2)


# ---------------------------------------------------------------------------- step semantics


@ALL_F32
def test_maximize_equals_minimizing_the_negated_loss(case: Case) -> None:
    # reference: torch.optim's maximize flag flips the gradient's sign (docs of SGD/Adam/AdamW)
    up, down = make_params(case.dtype), make_params(case.dtype)
    opt_up, opt_down = case.make(up, maximize=True), case.make(down)
    for s in range(STEPS):
        for i, (p, q) in enumerate(zip(up, down, strict=True)):
            g = gradient(s, i, p.shape, p.dtype)
            p.grad, q.grad = g, -g
        opt_up.step()
        opt_down.step()
    assert_equal_tensors([p.detach() for p in up], [p.detach() for p in down])
    if case.depth0:  # and numerically torch.optim's own maximize
        ref = make_params(case.dtype)
        ref_opt = case.make_reference(ref, maximize=True, fused=True)
        ours = make_params(case.dtype)
        ours_opt = case.make(ours, maximize=True, fused=True)
        run(ref_opt, ref, range(STEPS))
        run(ours_opt, ours, range(STEPS))
        assert_equal_tensors([p.detach() for p in ours], [p.detach() for p in ref])


@ALL_F32
def test_step_runs_the_closure_with_grad_enabled_and_returns_its_loss(case: Case) -> None:
    # reference: torch.optim.Optimizer.step(closure) (the closure runs under torch.enable_grad())
    params = make_params(case.dtype)
    opt = case.make(params)
    seen: list[bool] = []

    def closure() -> Tensor:
        seen.append(torch.is_grad_enabled())
        opt.zero_grad()
        loss = sum((p.float() ** 2).sum() for p in params)
        loss.backward()
        return loss

    before = [p.detach().clone() for p in params]
    with torch.no_grad():
        loss = opt.step(closure)
    assert seen == [True]
    assert isinstance(loss, Tensor) and loss.requires_grad
    assert all(not torch.equal(b, p) for b, p in zip(before, params, strict=True))


@with_known_defects(
    [c for c in CASES if c.dtype == torch.float32],
    {},
)
def test_parameters_without_grad_are_skipped_like_torch_optim(case: Case) -> None:
    # reference: torch.optim skips p.grad is None: the parameter is untouched and gets no state
    # entry; at depth 0 the state holds exactly what torch.optim's does
    params, ref_params = make_params(case.dtype), make_params(case.dtype)
    opt, ref_opt = case.make(params), case.make_reference(ref_params)
    untouched = params[1].detach().clone()
    for s in range(STEPS):
        for o, ps in ((opt, params), (ref_opt, ref_params)):
            for i in (0, 2):
                ps[i].grad = gradient(s, i, ps[i].shape, ps[i].dtype)
            o.step()
    assert torch.equal(params[1], untouched)
    assert params[1] not in opt.state
    if case.depth0:
        assert [sorted(opt.state[p]) for p in opt.state] == [sorted(ref_opt.state[p]) for p in ref_opt.state]


@ALL_F32
def test_zero_grad_sets_grads_to_none_by_default(case: Case) -> None:
    # reference: torch.optim.Optimizer.zero_grad(set_to_none=True) is the default since torch 2.0
    params = make_params(case.dtype)
    opt = case.make(params)
    run(opt, params, range(2))
    opt.zero_grad()
    assert all(p.grad is None for p in params)
    run(opt, params, range(2, 3))
    opt.zero_grad(set_to_none=False)
    assert all(p.grad is not None and not p.grad.any() for p in params)
    before = [p.detach().clone() for p in params]
    opt.zero_grad()
    opt.step()  # no gradients at all: nothing moves
    assert_equal_tensors([p.detach() for p in params], before)


@ALL
def test_dtype_is_preserved_and_step_sizes_stay_float64(case: Case) -> None:
    # reference: torch.optim keeps parameters and moment buffers in the parameter's dtype;
    # the learned step sizes are kept in float64 (a bf16 step size would round to 3 digits)
    params = make_params(case.dtype)
    opt = case.make(params)
    run(opt, params, range(STEPS))
    ref_params = make_params(case.dtype)
    ref_opt = case.make_reference(ref_params)
    run(ref_opt, ref_params, range(STEPS))
    for p, q in zip(params, ref_params, strict=True):
        assert p.dtype == case.dtype
        for k, v in ref_opt.state[q].items():
            assert opt.state[p][k].dtype == v.dtype, k
    sizes = opt.step_size_tensors()  # type: ignore[attr-defined]
    assert all(t.dtype == torch.float64 for t in sizes)
    # load_state_dict casts floating per-parameter state to the parameter's dtype; the step sizes stay float64
    fresh = case.make([p.detach().clone().requires_grad_() for p in params])
    fresh.load_state_dict(opt.state_dict())
    for a, b in zip(fresh.step_size_tensors(), sizes, strict=True):  # type: ignore[attr-defined]
        assert a.dtype == torch.float64 and torch.equal(a, b)
    if not case.depth0:
        assert sizes[0][0, 0] != case.info.kwargs["lr"]  # learned, and kept to float64 precision


def _lambda(step: int) -> float:
    return 1.0 / (1.0 + 0.3 * step)


@ALL_F32
def test_lambda_lr_scheduler_is_an_outer_factor(case: Case) -> None:
    # reference: torch.optim with the same LambdaLR owns group["lr"] (the same sequence of values);
    # at depth 0 the trajectory is torch.optim's; with levels, a constant factor c on lr is the
    # same run as lr * c typed directly (the scheduler only scales the learned step size)
    params, ref_params = make_params(case.dtype), make_params(case.dtype)
    opt = case.make(params, fused=True)
    ref_opt = case.make_reference(ref_params, fused=True)
    sched, ref_sched = LambdaLR(opt, _lambda), LambdaLR(ref_opt, _lambda)
    for s in range(STEPS):
        assert opt.param_groups[0]["lr"] == ref_opt.param_groups[0]["lr"]
        run(opt, params, range(s, s + 1))
        run(ref_opt, ref_params, range(s, s + 1))
        sched.step()
        ref_sched.step()
    assert sched.get_last_lr() == ref_sched.get_last_lr()
    if case.depth0:
        assert_equal_tensors([p.detach() for p in params], [p.detach() for p in ref_params])
        return
    scaled, direct = make_params(case.dtype), make_params(case.dtype)
    opt_scaled = case.make(scaled)
    LambdaLR(opt_scaled, lambda s: 0.5)
    opt_direct = case.make(direct, lr=case.info.kwargs["lr"] * 0.5)
    run(opt_scaled, scaled, range(STEPS))
    run(opt_direct, direct, range(STEPS))
    assert_equal_tensors([p.detach() for p in scaled], [p.detach() for p in direct])


# ---------------------------------------------------------------------------- 16-bit SGD


@pytest.mark.parametrize("dtype", [torch.bfloat16, torch.float16], ids=["bf16", "fp16"])
@pytest.mark.parametrize("tower", ["depth0", "defaults"])
def test_sixteen_bit_sgd_default_path_equals_the_for_loop(dtype: torch.dtype, tower: str) -> None:
    # reference: torch.optim.SGD(foreach=False) at depth 0; our own for-loop path (fused=False),
    # itself bitwise torch's for-loop at depth 0 (above), with levels
    kwargs = {"lr": 0.05, "momentum": 0.9, **TOWERS[tower]}
    ours, ref = make_params(dtype), make_params(dtype)
    opt = TowerSGD(ours, **kwargs)
    ref_opt = torch.optim.SGD(ref, lr=0.05, momentum=0.9, foreach=False) if tower == "depth0" else None
    ref_opt = ref_opt or TowerSGD(ref, fused=False, **kwargs)
    run(opt, ours, range(STEPS))
    run(ref_opt, ref, range(STEPS))
    assert_equal_tensors([p.detach() for p in ours], [p.detach() for p in ref])


# ---------------------------------------------------------------------------- memory layouts


def _layout(name: str, dtype: torch.dtype) -> tuple[Tensor, Callable[[Tensor], Tensor]]:
    """A parameter in layout ``name`` and how its gradient is laid out (from a contiguous one)."""
    gen = torch.Generator().manual_seed(5)

    def randn(*shape: int) -> Tensor:
        return torch.randn(shape, generator=gen, dtype=torch.float64).to(dtype)

    if name == "strided_slice":  # every other column of a larger tensor; its gradient dense
        return randn(6, 8)[:, ::2].requires_grad_(), lambda g: g.contiguous()
    if name == "transposed_grad_contiguous":  # as a hook that makes the gradient contiguous leaves it
        return randn(8, 6).t().requires_grad_(), lambda g: g.contiguous()
    if name == "channels_last_grad_contiguous":
        return randn(2, 3, 4, 4).contiguous(
            memory_format=torch.channels_last
        ).requires_grad_(), lambda g: g.contiguous()
    if name == "contiguous_grad_transposed":
        return randn(6, 8).requires_grad_(), lambda g: g.t().contiguous().t()
    if name == "expanded_grad":  # a zero-stride gradient (e.g. the gradient of a broadcast)
        return randn(4, 5).requires_grad_(), lambda g: g[:1].expand(4, 5)
    assert name == "channels_last"
    channels_last = torch.channels_last
    return randn(2, 3, 4, 4).contiguous(memory_format=channels_last).requires_grad_(), lambda g: g.contiguous(
        memory_format=channels_last
    )


LAYOUTS = [
    "strided_slice",
    "transposed_grad_contiguous",
    "channels_last",
    "channels_last_grad_contiguous",
    "contiguous_grad_transposed",
    "expanded_grad",
]

#: Loose enough for the rounding of a different (correct) path, far below the 0.7-1.75 of a wrong one.
PATH_TOL = {torch.float32: 1e-6, torch.float64: 1e-13, torch.bfloat16: 2e-2}


def _run_layout(opt: Optimizer, p: Tensor, relayout: Callable[[Tensor], Tensor]) -> None:
    for s in range(STEPS):
        p.grad = relayout(gradient(s, 0, p.shape, p.dtype).contiguous())
        opt.step()


@pytest.mark.parametrize("layout", LAYOUTS)
@over([c for c in CASES if c.tower != "depth2"], lambda c: c.dtype == torch.float64)
def test_non_contiguous_parameters_update_like_torch_optim(case: Case, layout: str) -> None:
    # reference: at depth 0, torch.optim's for-loop path (foreach=False, fused=False) on the same
    # layouts; with levels, the same optimizer on a contiguous copy with contiguous gradients
    p, relayout = _layout(layout, case.dtype)
    contiguous = torch.contiguous_format
    q = (p.detach().clone() if case.depth0 else p.detach().clone(memory_format=contiguous)).requires_grad_()
    if case.depth0:
        ref_opt = case.make_reference([q], foreach=False, fused=False)
        ref_relayout = relayout
    else:
        ref_opt, ref_relayout = case.make([q]), (lambda g: relayout(g).contiguous())
        assert q.is_contiguous()
    opt = case.make([p])
    _run_layout(opt, p, relayout)
    _run_layout(ref_opt, q, ref_relayout)
    assert p.stride() == _layout(layout, case.dtype)[0].stride()  # the layout was kept
    exact = case.depth0
    tol = 0.0 if exact else PATH_TOL[case.dtype]
    torch.testing.assert_close(p.detach(), q.detach(), rtol=tol, atol=tol)
    if not case.depth0:
        # the learned step sizes follow dot products of the (rounded) weights: bf16 rounds at 4e-3
        size_tol = 1e-2 if case.dtype == torch.bfloat16 else 1e-5
        torch.testing.assert_close(opt.step_size_tensors()[0], ref_opt.step_size_tensors()[0], rtol=size_tol, atol=0)
