"""Property tests: random configurations fed random gradient streams.

Gradients are written straight into ``.grad`` (no model), so every kind of stream can be
produced: ordinary, huge, tiny, exactly zero, sign-flipping every step, and occasional
inf / nan entries. Whatever arrives, step sizes must stay positive and finite and the
learned state must stay finite; with ``lr <= 1`` and bounded gradients, so must the weights.
And every step keeps the bounds by construction: log step sizes within ±69, moving by at most
1 per taken step, by a factor in [1e-4, 1/2] on a retreat, not at all on a skipped step.
"""

from __future__ import annotations

import math
from typing import Any

import torch
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from torch import Tensor

from stepsize_tower import Level, TowerAdam, TowerAdamW, TowerSGD

SHAPES = [(3, 2), (4,)]
BOUND = 1e3  # "bounded" gradients: finite, every entry at most this in magnitude

# derandomize: the same examples on every run, so CI is reproducible; counterexamples found
# by longer random runs are pinned below as explicit regression tests.
SETTINGS = settings(
    max_examples=60,
    deadline=None,
    derandomize=True,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)

log_lr = st.floats(min_value=-8.0, max_value=2.0)  # initial lr from 1e-8 to 1e2


@st.composite
def configurations(draw: st.DrawFn, kinds: tuple[str, ...] = ("adam", "sgd")) -> dict[str, Any]:
    base = draw(st.sampled_from(["sgd", "adam", "adamw"]))
    depth = draw(st.integers(0, 3))
    levels = [Level(kind=draw(st.sampled_from(kinds)), lr=10 ** draw(st.floats(-4.0, -0.5))) for _ in range(depth)]
    cfg: dict[str, Any] = {
        "base": base,
        "lr": 10 ** draw(log_lr),
        "levels": levels,
        "granularity": draw(st.sampled_from(["group", "tensor"])),
        "dtype": draw(st.sampled_from([torch.float32, torch.float64])),
    }
    if base == "sgd":
        momentum = draw(st.one_of(st.just(0.0), st.floats(0.0, 0.99)))
        cfg["momentum"] = momentum
        cfg["nesterov"] = momentum > 0 and draw(st.booleans())
        cfg["weight_decay"] = draw(st.sampled_from([0.0, 1e-2]))
    else:
        cfg["betas"] = (draw(st.floats(0.0, 0.99)), draw(st.floats(0.5, 0.9999)))
        cfg["fused"] = draw(st.sampled_from([None, False]))
    return cfg


KINDS = ["normal", "huge", "tiny", "zero", "flip", "inf", "nan"]


@st.composite
def gradient_streams(draw: st.DrawFn, allow_nonfinite: bool = True) -> list[tuple[str, int, float]]:
    kinds = KINDS if allow_nonfinite else KINDS[:5]
    n = draw(st.integers(1, 25))
    return [
        (draw(st.sampled_from(kinds)), draw(st.integers(0, 2**16)), 10 ** draw(st.floats(-3.0, 3.0))) for _ in range(n)
    ]


def build(cfg: dict[str, Any], params: list[Tensor]) -> torch.optim.Optimizer:
    common = {"lr": cfg["lr"], "levels": cfg["levels"], "granularity": cfg["granularity"]}
    if cfg["base"] == "sgd":
        return TowerSGD(
            params,
            momentum=cfg["momentum"],
            nesterov=cfg["nesterov"],
            weight_decay=cfg["weight_decay"],
            **common,
        )
    cls = TowerAdam if cfg["base"] == "adam" else TowerAdamW
    return cls(params, betas=cfg["betas"], fused=cfg["fused"], **common)


def make_grad(kind: str, seed: int, scale: float, step: int, shape: tuple[int, ...], dtype: torch.dtype) -> Tensor:
    gen = torch.Generator().manual_seed(seed)
    g = torch.randn(shape, generator=gen, dtype=torch.float64) * scale
    if kind == "huge":
        g = g * 1e15
    elif kind == "tiny":
        g = g * 1e-30
    elif kind == "zero":
        g = torch.zeros(shape, dtype=torch.float64)
    elif kind == "flip":
        # The same direction every step, with the sign flipping: the worst case for a step size.
        g = torch.ones(shape, dtype=torch.float64) * scale * (-1) ** step
    elif kind in ("inf", "nan"):
        g.view(-1)[seed % g.numel()] = math.inf if kind == "inf" else math.nan
    return g.to(dtype)


def run(
    cfg: dict[str, Any], stream: list[tuple[str, int, float]], bound: float | None = None
) -> tuple[torch.optim.Optimizer, list[Tensor]]:
    """Feed ``stream`` to a fresh optimizer, checking the learned state after every step."""
    gen = torch.Generator().manual_seed(0)
    params = [torch.randn(s, generator=gen, dtype=torch.float64).to(cfg["dtype"]).requires_grad_() for s in SHAPES]
    opt = build(cfg, params)
    for step, (kind, seed, scale) in enumerate(stream):
        for i, p in enumerate(params):
            g = make_grad(kind, seed + i, scale, step, p.shape, p.dtype)
            p.grad = g if bound is None else g.clamp(-bound, bound)
        before = [{k: v.clone() for k, v in g["tower"].items()} if "tower" in g else None for g in opt.param_groups]
        opt.step()
        check_learned_state(opt)
        check_bounded_moves(opt, before)
    return opt, params


def check_bounded_moves(opt: torch.optim.Optimizer, before: list[dict[str, Tensor] | None]) -> None:
    """The bounds by construction (``stepsize_tower.levels``), a step at a time.

    Log step sizes stay in [-69, 69]; a taken step moves each by at most 1 (``clip(a_k d_k, ±1)``);
    a retreat moves only u_0, by the log of a factor in [1e-4, 1/2]; a skipped step moves nothing.
    Exempt: a group's first taken step, where Adam's first-step limit may cut a_0 by any factor.
    """
    for group, old in zip(opt.param_groups, before, strict=True):
        if old is None or not group["levels"]:
            continue
        new = group["tower"]
        u_old, u_new = old["log_step"], new["log_step"]
        move = u_new - u_old
        retreated = bool(new["retreats"] > old["retreats"])
        # Recorded defect: a retreat ignores the ±69 bound (test_mechanics_pinned.py,
        # test_a_small_first_gradient_does_not_lock_the_growth_guard); levels keep it.
        # (so u_0 may stay beyond it until the next taken step, e.g. across a skipped step).
        ever_retreated = bool(new["retreats"] > 0)
        assert (u_new[:, 1:].abs() <= 69.0).all() and (ever_retreated or (u_new[:, 0].abs() <= 69.0).all()), u_new
        if bool(new["skipped"] > old["skipped"]):
            assert torch.equal(u_new, u_old)
        elif retreated:
            assert (move[:, 0] <= math.log(0.5) + 1e-12).all() and (move[:, 0] >= math.log(1e-4) - 1e-12).all(), move
            assert torch.equal(u_new[:, 1:], u_old[:, 1:])
        elif bool(old["step"] > 0):  # (measured from the bound: a retreat may have left u_0 beyond it)
            assert ((u_new - u_old.clamp(-69.0, 69.0)).abs() <= 1.0 + 1e-12).all(), move


def check_learned_state(opt: torch.optim.Optimizer) -> None:
    for sizes in opt.step_size_tensors():
        assert torch.isfinite(sizes).all(), sizes
        assert (sizes > 0).all(), sizes
    for sizes in opt.step_sizes():
        assert all(math.isfinite(a) and a > 0 for a in sizes), sizes
    for group in opt.param_groups:
        for key, value in group.get("tower", {}).items():
            assert value.dtype == torch.float64, key
            assert torch.isfinite(value).all(), (key, value)


# Level kinds: "adam" levels (the default) and any mix with plain-descent "sgd" levels are held
# to the same properties. Mixes with "sgd" levels used to overflow (their hypergradients feed on
# each other); bounded level changes and clamped hypergradients fixed that.


@SETTINGS
@given(cfg=configurations(kinds=("adam",)), stream=gradient_streams())
def test_step_sizes_and_learned_state_stay_positive_and_finite(cfg: dict[str, Any], stream: list) -> None:
    check_stream(cfg, stream)


@SETTINGS
@given(cfg=configurations(), stream=gradient_streams())
def test_step_sizes_and_learned_state_stay_positive_and_finite_with_sgd_levels(
    cfg: dict[str, Any], stream: list
) -> None:
    check_stream(cfg, stream)


def check_stream(cfg: dict[str, Any], stream: list) -> None:
    opt, _ = run(cfg, stream)
    n_nonfinite = sum(kind in ("inf", "nan") for kind, _, _ in stream)
    assert opt.skipped_steps() >= n_nonfinite


@SETTINGS
@given(cfg=configurations(kinds=("adam",)), stream=gradient_streams(allow_nonfinite=False))
def test_weights_stay_finite_for_bounded_gradients_and_lr_at_most_one(cfg: dict[str, Any], stream: list) -> None:
    check_bounded(cfg, stream)


@SETTINGS
@given(cfg=configurations(), stream=gradient_streams(allow_nonfinite=False))
def test_weights_stay_finite_for_bounded_gradients_and_lr_at_most_one_with_sgd_levels(
    cfg: dict[str, Any], stream: list
) -> None:
    check_bounded(cfg, stream)


def check_bounded(cfg: dict[str, Any], stream: list) -> None:
    cfg["lr"] = min(cfg["lr"], 1.0)
    stream = [(kind, seed, scale) for kind, seed, scale in stream if kind != "huge"]
    _, params = run(cfg, stream, bound=BOUND)
    for p in params:
        assert torch.isfinite(p).all(), p


@SETTINGS
@given(cfg=configurations(kinds=("adam",)), stream=gradient_streams(), bad_at=st.integers(0, 24))
def test_a_non_finite_gradient_changes_nothing(cfg: dict[str, Any], stream: list, bad_at: int) -> None:
    check_skip(cfg, stream, bad_at)


@SETTINGS
@given(cfg=configurations(), stream=gradient_streams(), bad_at=st.integers(0, 24))
def test_a_non_finite_gradient_changes_nothing_with_sgd_levels(cfg: dict[str, Any], stream: list, bad_at: int) -> None:
    check_skip(cfg, stream, bad_at)


def check_skip(cfg: dict[str, Any], stream: list, bad_at: int) -> None:
    # Wherever an inf/nan gradient lands in a stream, that step leaves weights, base state
    # and learned state bit-identical, and counts as skipped.
    bad_at = bad_at % len(stream)
    gen = torch.Generator().manual_seed(0)
    params = [torch.randn(s, generator=gen, dtype=torch.float64).to(cfg["dtype"]).requires_grad_() for s in SHAPES]
    opt = build(cfg, params)
    for step, (kind, seed, scale) in enumerate(stream):
        if step == bad_at:
            kind = "nan" if seed % 2 else "inf"
            before = [p.detach().clone() for p in params]
            state_before = {id(p): {k: v.clone() for k, v in opt.state[p].items()} for p in params}
            tower_before = [{k: v.clone() for k, v in g.get("tower", {}).items()} for g in opt.param_groups]
            skipped_before = opt.skipped_steps()
        for i, p in enumerate(params):
            p.grad = make_grad(kind, seed + i, scale, step, p.shape, p.dtype)
        opt.step()
        if step == bad_at:
            assert opt.skipped_steps() == skipped_before + 1
            for p, p0 in zip(params, before, strict=True):
                assert torch.equal(p, p0)
            for p in params:
                saved = state_before[id(p)]
                for k, v in opt.state[p].items():
                    if k in saved:
                        assert torch.equal(v, saved[k]), k
                    else:  # lazily created on a skipped first step: must equal fresh state
                        assert not v.any(), k
            for g, saved in zip(opt.param_groups, tower_before, strict=True):
                for k, v in g.get("tower", {}).items():
                    if k != "skipped" and k in saved:
                        assert torch.equal(v, saved[k]), k
        check_learned_state(opt)


# ---------------------------------------------------------------------------- pinned counterexamples
# Found by longer random runs of the properties above (max_examples=800..1500); each was a
# real defect (what was measured before the fix is in the docstring) and is now a regression test.

STACKED = [Level("sgd", lr=0.1), Level("sgd", lr=0.1), Level("adam", lr=0.1)]


def test_finite_huge_gradient_keeps_stacked_sgd_levels_finite() -> None:
    """Regression: measured before the fix: one finite 1e15-scale gradient sends a_0 to the clamp (9.25e29)
    in one step; the hypergradient chain grows 1e16 -> 1e30 -> 1e57 -> 1e114, exp_avg_sq overflows to
    inf at step 4 and every step size is nan at step 6 (weights nan)
    """
    cfg = {
        "base": "adamw",
        "lr": 1.0,
        "levels": STACKED,
        "granularity": "group",
        "dtype": torch.float64,
        "betas": (0.0, 0.5),
        "fused": None,
    }
    stream = [("normal", 0, 1.0), ("huge", 0, 1.0), ("normal", 0, 1.0), ("normal", 2, 1.0), ("normal", 0, 1.0)]
    stream.append(("normal", 0, 1.0))
    _, params = run(cfg, stream)
    assert all(torch.isfinite(p).all() for p in params)


def test_bounded_gradients_keep_mixed_level_state_finite() -> None:
    """Regression: measured before the fix: constant N(0,1) gradients, lr=1, levels [sgd 0.01, adam 0.1,
    sgd 0.1]: a_0 goes 1 -> 15 -> 9.25e29 at step 6, then 1e-30; hypergradients reach 1e162 and
    exp_avg_sq overflows to inf at step 11 (weights reach 3e26)
    """
    cfg = {
        "base": "sgd",
        "lr": 1.0,
        "levels": [Level("sgd", lr=0.01), Level("adam", lr=0.1), Level("sgd", lr=0.1)],
        "granularity": "group",
        "dtype": torch.float64,
        "momentum": 0.5,
        "nesterov": False,
        "weight_decay": 0.01,
    }
    run(cfg, [("normal", 0, 1.0)] * 14, bound=BOUND)


def test_bounded_gradients_never_stall_the_optimizer() -> None:
    """Regression: measured before the fix: float32, lr=1, one sgd level (lr 0.1), weight decay 1e-2,
    gradients of scale 1-10: a_0 jumps 3.21 -> 3.64e21 in one step, weights reach 7.9e22, and from then
    on every step is skipped (the float32 dot product overflows): the optimizer never moves again
    """
    cfg = {
        "base": "sgd",
        "lr": 1.0,
        "levels": [Level("sgd", lr=0.1)],
        "granularity": "group",
        "dtype": torch.float32,
        "momentum": 0.0,
        "nesterov": False,
        "weight_decay": 0.01,
    }
    opt, _ = run(cfg, [("normal", 0, 1.0), ("normal", 0, 1.0), ("normal", 0, 10.0), ("normal", 0, 1.0)], bound=BOUND)
    assert opt.skipped_steps() == 0
