"""Reference correctness against ``torch.optim`` and between the two Adam update paths.

* ``depth=0`` must be exactly the fixed-rate ``torch.optim`` optimizer (float64, 50 steps,
  max abs weight difference 1e-12), for every option that changes the update.
* The fused update path of ``TowerAdam`` / ``TowerAdamW`` (torch's fused kernel) must agree
  with the readable reference path (``fused=False``) at depths 1 and 2, step sizes included.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import pytest
import tiny_net
import torch
from torch import Tensor

from stepsize_tower import Level, TowerAdam, TowerAdamW, TowerSGD

# Bit for bit against torch.optim or another path of ours: the reference path (conftest.py).
pytestmark = pytest.mark.usefixtures("reference_path")

DTYPE = torch.float64
N_IN, N_HIDDEN, N_OUT, BATCH = 5, 7, 3, 8


def _init_params(seed: int = 0) -> list[Tensor]:
    return tiny_net.init_params(N_IN, N_HIDDEN, N_OUT, seed)


def _batches(n: int, seed: int = 1) -> list[tuple[Tensor, Tensor]]:
    return tiny_net.batches(n, N_IN, N_OUT, BATCH, seed)


_loss = tiny_net.mse_loss


def _groups(params: list[Tensor], split: dict[str, Any] | None) -> Any:
    """All weights in one group, or two groups (first layer / second layer with overrides)."""
    if split is None:
        return params
    return [{"params": params[:2]}, {"params": params[2:], **split}]


def _train(make_opt: Callable[[Any], torch.optim.Optimizer], split: dict[str, Any] | None, steps: int):
    params = _init_params()
    opt = make_opt(_groups(params, split))
    for batch in _batches(steps):
        opt.zero_grad()
        _loss(params, batch).backward()
        opt.step()
    return [p.detach() for p in params], opt


def _max_abs_diff(a: list[Tensor], b: list[Tensor]) -> float:
    return max(float((x - y).abs().max()) for x, y in zip(a, b, strict=True))


def _assert_moved(ws: list[Tensor]) -> None:
    """The comparison must exercise real updates, not two optimizers that never moved."""
    moved = _max_abs_diff(ws, [p.detach() for p in _init_params()])
    assert moved > 1e-3, f"weights barely moved ({moved:.3g}); the comparison would be vacuous"


# ----------------------------------------------------------------------------- depth 0 == torch.optim

# (name, shared kwargs, second-group overrides or None)
SGD_CASES = [
    ("plain", {"lr": 0.05}, None),
    ("momentum", {"lr": 0.05, "momentum": 0.9}, None),
    ("dampening", {"lr": 0.05, "momentum": 0.9, "dampening": 0.3}, None),
    ("nesterov", {"lr": 0.05, "momentum": 0.9, "nesterov": True}, None),
    ("weight_decay", {"lr": 0.05, "momentum": 0.5, "weight_decay": 0.05}, None),
    ("maximize", {"lr": 0.01, "momentum": 0.5, "maximize": True}, None),
    ("two_groups", {"lr": 0.05, "momentum": 0.9}, {"lr": 0.02, "momentum": 0.5, "weight_decay": 0.01}),
]


@pytest.mark.parametrize("fused", [False, None], ids=["fused=False", "fused=None"])
@pytest.mark.parametrize(("name", "kwargs", "split"), SGD_CASES, ids=[c[0] for c in SGD_CASES])
def test_depth0_matches_torch_sgd(
    name: str, kwargs: dict[str, Any], split: dict[str, Any] | None, fused: bool | None
) -> None:
    # reference: torch.optim.SGD (single-tensor reference implementation)
    ours, _ = _train(lambda p: TowerSGD(p, depth=0, fused=fused, **kwargs), split, steps=50)
    ref, _ = _train(lambda p: torch.optim.SGD(p, foreach=False, **kwargs), split, steps=50)
    _assert_moved(ref)
    assert _max_abs_diff(ours, ref) <= 1e-12


ADAM_CASES = [
    ("default_betas", {"lr": 0.01}, None),
    ("other_betas_eps", {"lr": 0.01, "betas": (0.8, 0.99), "eps": 1e-6}, None),
    ("weight_decay", {"lr": 0.01, "weight_decay": 0.1}, None),
    ("maximize", {"lr": 0.005, "maximize": True}, None),
    ("two_groups", {"lr": 0.01}, {"lr": 0.03, "betas": (0.5, 0.9), "weight_decay": 0.05}),
]

ADAMW_CASES = [
    ("default_decay", {"lr": 0.01}, None),
    ("strong_decay_other_betas", {"lr": 0.01, "weight_decay": 0.3, "betas": (0.85, 0.95)}, None),
    ("maximize", {"lr": 0.005, "weight_decay": 0.1, "maximize": True}, None),
    ("two_groups", {"lr": 0.01, "weight_decay": 0.1}, {"lr": 0.03, "weight_decay": 0.0}),
]

FUSED = [False, True, None]


@pytest.mark.parametrize("fused", FUSED, ids=[f"fused={f}" for f in FUSED])
@pytest.mark.parametrize(("name", "kwargs", "split"), ADAM_CASES, ids=[c[0] for c in ADAM_CASES])
def test_depth0_matches_torch_adam(
    name: str, kwargs: dict[str, Any], split: dict[str, Any] | None, fused: bool | None
) -> None:
    # reference: torch.optim.Adam (single-tensor reference implementation)
    ours, _ = _train(lambda p: TowerAdam(p, depth=0, fused=fused, **kwargs), split, steps=50)
    ref, _ = _train(lambda p: torch.optim.Adam(p, foreach=False, **kwargs), split, steps=50)
    _assert_moved(ref)
    assert _max_abs_diff(ours, ref) <= 1e-12


@pytest.mark.parametrize("fused", FUSED, ids=[f"fused={f}" for f in FUSED])
@pytest.mark.parametrize(("name", "kwargs", "split"), ADAMW_CASES, ids=[c[0] for c in ADAMW_CASES])
def test_depth0_matches_torch_adamw(
    name: str, kwargs: dict[str, Any], split: dict[str, Any] | None, fused: bool | None
) -> None:
    # reference: torch.optim.AdamW (single-tensor reference implementation)
    ours, _ = _train(lambda p: TowerAdamW(p, depth=0, fused=fused, **kwargs), split, steps=50)
    ref, _ = _train(lambda p: torch.optim.AdamW(p, foreach=False, **kwargs), split, steps=50)
    _assert_moved(ref)
    assert _max_abs_diff(ours, ref) <= 1e-12


def test_depth0_adamw_default_weight_decay_matches_torch_default() -> None:
    # reference: torch.optim.AdamW's default weight_decay (1e-2), both left unset
    ours, _ = _train(lambda p: TowerAdamW(p, lr=0.01, depth=0), None, steps=50)
    ref, _ = _train(lambda p: torch.optim.AdamW(p, lr=0.01, foreach=False), None, steps=50)
    assert _max_abs_diff(ours, ref) <= 1e-12


# ----------------------------------------------------------------------------- fused == reference path

TOWERS = [
    ("depth1_adam_level", {"depth": 1}),
    ("depth1_sgd_level", {"levels": [Level("sgd", lr=0.05)]}),
    ("depth2_default", {"depth": 2}),
    ("depth2_mixed_tensor_units", {"levels": ["adam", Level("sgd", lr=0.01)], "granularity": "tensor"}),
]


@pytest.mark.parametrize("cls", [TowerAdam, TowerAdamW], ids=["adam", "adamw"])
@pytest.mark.parametrize("retreat", [True, False], ids=["retreat", "no_retreat"])
@pytest.mark.parametrize(("name", "tower"), TOWERS, ids=[t[0] for t in TOWERS])
def test_fused_update_matches_reference_path(
    cls: type[TowerAdam], retreat: bool, name: str, tower: dict[str, Any], monkeypatch: pytest.MonkeyPatch
) -> None:
    # reference: the fused=False path, itself checked against torch.optim.Adam/AdamW above
    # (common practice: a fast path is tested equal to the readable one in float64)
    def make(fused: bool):
        return lambda p: cls(p, lr=0.05, weight_decay=0.05, retreat=retreat, fused=fused, **tower)

    # Count calls of torch's fused kernel, so that the "fused" run provably used it.
    kernel_name = "_fused_adamw_" if cls is TowerAdamW else "_fused_adam_"
    kernel, calls = getattr(torch, kernel_name), []

    def counting_kernel(*args: Any, **kwargs: Any) -> Any:
        calls.append(1)
        return kernel(*args, **kwargs)

    monkeypatch.setattr(torch, kernel_name, counting_kernel)
    split = {"lr": 0.02, "betas": (0.8, 0.99)}
    ours, opt_fused = _train(make(True), split, steps=30)
    n_fused_calls = len(calls)
    ref, opt_ref = _train(make(False), split, steps=30)
    assert n_fused_calls > 0 and len(calls) == n_fused_calls, "fused=True must use the kernel, fused=False not"
    _assert_moved(ref)
    assert _max_abs_diff(ours, ref) <= 1e-12
    for sizes_fused, sizes_ref in zip(opt_fused.step_size_tensors(), opt_ref.step_size_tensors(), strict=True):
        torch.testing.assert_close(sizes_fused, sizes_ref, rtol=1e-12, atol=0.0)
    initial = cls(_groups(_init_params(), split), lr=0.05, **tower).step_size_tensors()
    final = opt_ref.step_size_tensors()
    learned = max(float((a.log() - b.log()).abs().max()) for a, b in zip(final, initial, strict=True))
    assert learned > 1e-3, "the step sizes never moved; the comparison would be vacuous"


SGD_BASES = [
    ("plain", {}),
    ("momentum", {"momentum": 0.9, "weight_decay": 0.05}),
    ("nesterov", {"momentum": 0.9, "nesterov": True}),
    ("dampening_maximize", {"momentum": 0.5, "dampening": 0.3, "maximize": True}),
]


@pytest.mark.parametrize("retreat", [True, False], ids=["retreat", "no_retreat"])
@pytest.mark.parametrize(("name", "tower"), TOWERS, ids=[t[0] for t in TOWERS])
@pytest.mark.parametrize(("base", "base_kwargs"), SGD_BASES, ids=[b[0] for b in SGD_BASES])
def test_fused_sgd_update_matches_reference_path(
    base: str,
    base_kwargs: dict[str, Any],
    retreat: bool,
    name: str,
    tower: dict[str, Any],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # reference: the fused=False path, itself checked against torch.optim.SGD above
    # (common practice: a fast path is tested equal to the readable one in float64)
    # native=False: torch's kernels on both sides (the native ones: test_native_sgd.py). horizon 0: the two
    # kernels round a dampened buffer differently in float64, and a trail (every SGD's default) feeds those
    # differences back into the step size (measured up to 8e-10 relative with an SGD-like level and
    # maximize); the trail's own passes are the same code on both sides.
    def make(fused: bool):
        return lambda p: TowerSGD(
            p, lr=0.05, retreat=retreat, fused=fused, native=False, horizon=0.0, **base_kwargs, **tower
        )

    kernel, calls = torch._fused_sgd_, []

    def counting_kernel(*args: Any, **kwargs: Any) -> Any:
        calls.append(1)
        return kernel(*args, **kwargs)

    monkeypatch.setattr(torch, "_fused_sgd_", counting_kernel)
    split = {"lr": 0.02, "momentum": base_kwargs.get("momentum", 0.0)}
    ours, opt_fused = _train(make(True), split, steps=30)
    n_fused_calls = len(calls)
    ref, opt_ref = _train(make(False), split, steps=30)
    assert n_fused_calls > 0 and len(calls) == n_fused_calls, "fused=True must use the kernel, fused=False not"
    _assert_moved(ref)
    tol = 1e-12
    for w_fused, w_ref in zip(ours, ref, strict=True):  # relative: maximize grows the weights
        torch.testing.assert_close(w_fused, w_ref, rtol=tol, atol=tol)
    for sizes_fused, sizes_ref in zip(opt_fused.step_size_tensors(), opt_ref.step_size_tensors(), strict=True):
        torch.testing.assert_close(sizes_fused, sizes_ref, rtol=tol, atol=0.0)
    assert opt_fused.retreats() == opt_ref.retreats()
