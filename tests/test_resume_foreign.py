"""Resuming from checkpoints the tower did not write: ``torch.optim``'s, older or edited ones.

Reference throughout: ``torch.optim`` itself. A ``torch.optim`` run is checkpointed mid-way
(through ``torch.save`` / ``torch.load(weights_only=True)``) and continued (a) by the same
``torch.optim`` class and (b) by the tower class loaded from the same checkpoint. Both sides
use torch's fused kernel (``fused=True``), the one path on which ``depth=0`` and
``torch.optim`` agree bitwise in float32 today (the for-loop paths differ in the last bit).
"""

from __future__ import annotations

import copy
import io
from collections.abc import Callable
from typing import Any

import pytest
import tiny_net
import torch
from torch import Tensor

from stepsize_tower import TowerAdam, TowerAdamW, TowerSGD
from stepsize_tower.options import DEFAULT_ADAM_HORIZON, DEFAULT_HORIZON

# Bit for bit against torch.optim or another path of ours: the reference path (conftest.py).
pytestmark = pytest.mark.usefixtures("reference_path")

N_IN, N_HIDDEN, N_OUT, BATCH = 5, 7, 3, 8
BEFORE, AFTER = 8, 8  # steps before the checkpoint, steps after it

# (name, torch.optim class, tower class, base hyperparameters: the checkpoint's)
CASES: list[tuple[str, type[Any], type[Any], dict[str, Any]]] = [
    ("adam", torch.optim.Adam, TowerAdam, {"lr": 1e-2, "betas": (0.8, 0.99), "weight_decay": 1e-3}),
    ("adamw", torch.optim.AdamW, TowerAdamW, {"lr": 1e-2, "weight_decay": 0.1}),
    ("sgd", torch.optim.SGD, TowerSGD, {"lr": 0.05}),
    ("sgd_momentum", torch.optim.SGD, TowerSGD, {"lr": 0.05, "momentum": 0.9, "dampening": 0.1}),
    ("sgd_nesterov", torch.optim.SGD, TowerSGD, {"lr": 0.05, "momentum": 0.9, "nesterov": True, "weight_decay": 0.01}),
]
IDS = [c[0] for c in CASES]


def _params() -> list[Tensor]:
    return [p.detach().float().requires_grad_() for p in tiny_net.init_params(N_IN, N_HIDDEN, N_OUT)]


def _batches() -> list[tuple[Tensor, Tensor]]:
    return [(x.float(), y.float()) for x, y in tiny_net.batches(BEFORE + AFTER + 16, N_IN, N_OUT, BATCH)]


def _train(opt: torch.optim.Optimizer, params: list[Tensor], batches: list[tuple[Tensor, Tensor]]) -> float:
    loss = torch.zeros(())
    for batch in batches:
        opt.zero_grad()
        loss = tiny_net.mse_loss(params, batch)
        loss.backward()
        opt.step()
    return float(loss.detach())


def _roundtrip(obj: Any) -> Any:
    buf = io.BytesIO()
    torch.save(obj, buf)
    buf.seek(0)
    return torch.load(buf, weights_only=True)


def _torch_checkpoint(torch_cls: type[Any], kw: dict[str, Any]) -> tuple[list[Tensor], Any]:
    """Weights and the optimizer checkpoint of a ``torch.optim`` run of BEFORE steps."""
    params = _params()
    opt = torch_cls(params, fused=True, **kw)
    _train(opt, params, _batches()[:BEFORE])
    return [p.detach().clone() for p in params], _roundtrip(opt.state_dict())


def _resume(weights: list[Tensor], make: Callable[[list[Tensor]], torch.optim.Optimizer], ckpt: Any) -> Any:
    """Fresh weights and optimizer loaded from the checkpoint (a copy: the load must not alias it)."""
    params = [w.clone().requires_grad_() for w in weights]
    opt = make(params)
    opt.load_state_dict(copy.deepcopy(ckpt))
    return params, opt


def _assert_state_equal(theirs: dict[str, Any], ours: dict[str, Any]) -> None:
    """Every per-parameter buffer ``torch.optim`` keeps, bitwise (ours may keep more)."""
    for key, value in theirs.items():
        if isinstance(value, Tensor):
            assert torch.equal(ours[key], value), key


# ----------------------------------------------------------------------------- item: torch.optim checkpoints


@pytest.mark.parametrize(("name", "torch_cls", "tower_cls", "kw"), CASES, ids=IDS)
def test_depth0_resumes_a_torch_checkpoint_bitwise(
    name: str, torch_cls: type[Any], tower_cls: type[Any], kw: dict[str, Any]
) -> None:
    weights, ckpt = _torch_checkpoint(torch_cls, kw)
    after = _batches()[BEFORE : BEFORE + AFTER]
    # (a) reference: torch.optim continues from its own checkpoint
    ref_params, ref = _resume(weights, lambda ps: torch_cls(ps, fused=True, **kw), ckpt)
    _train(ref, ref_params, after)
    # (b) the tower at depth 0, constructed with another lr: the checkpoint's lr is the one used
    params, opt = _resume(weights, lambda ps: tower_cls(ps, lr=0.5, depth=0), ckpt)
    assert opt.param_groups[0]["lr"] == kw["lr"]
    assert opt.param_groups[0]["levels"] == []  # tower options from the construction
    _train(opt, params, after)
    moved = max(float((p.detach() - w).abs().max()) for p, w in zip(params, weights, strict=True))
    assert moved > 1e-3, moved  # real updates, not two optimizers standing still
    for p, q in zip(params, ref_params, strict=True):
        assert torch.equal(p.detach(), q.detach())
        _assert_state_equal(ref.state[q], opt.state[p])


@pytest.mark.parametrize(("name", "torch_cls", "tower_cls", "kw"), CASES, ids=IDS)
def test_defaults_resume_with_the_checkpoint_state_and_learn_from_there(
    name: str, torch_cls: type[Any], tower_cls: type[Any], kw: dict[str, Any]
) -> None:
    weights, ckpt = _torch_checkpoint(torch_cls, kw)
    batches = _batches()[BEFORE:]
    # reference: one more torch.optim step from the checkpoint
    ref_params, ref = _resume(weights, lambda ps: torch_cls(ps, fused=True, **kw), ckpt)
    _train(ref, ref_params, batches[:1])
    tower_kw = {k: v for k, v in kw.items() if k != "lr"}  # the swap a user makes: same base options
    params, opt = _resume(weights, lambda ps: tower_cls(ps, lr=0.5, retreat=False, **tower_kw), ckpt)
    group = opt.param_groups[0]
    assert group["lr"] == kw["lr"] and group["retreat"] is False and len(group["levels"]) == 1
    for i, p in enumerate(params):  # adopted as saved: moments, step counts, momentum buffers
        _assert_state_equal(ckpt["state"].get(i, {}), opt.state[p])
    start = tiny_net.mse_loss(params, batches[1]).item()
    # The tower starts fresh at the checkpoint's lr: its first step is torch.optim's, bitwise.
    _train(opt, params, batches[:1])
    for p, q in zip(params, ref_params, strict=True):
        assert torch.equal(p.detach(), q.detach())
        _assert_state_equal(ref.state[q], opt.state[p])
    # ... and it learns from there: the step sizes leave lr, the loss goes down.
    end = _train(opt, params, batches[1:])
    assert int(opt.param_groups[0]["tower"]["step"]) == len(batches)  # the tower's own count: fresh
    if "step" in opt.state[params[0]]:  # Adam: the base's count continues the checkpoint's
        assert int(opt.state[params[0]]["step"]) == BEFORE + len(batches)
    sizes = opt.step_size_tensors()[0][:, 0]
    assert (sizes / kw["lr"] - 1).abs().min() > 1e-3, sizes
    assert end < start, (start, end)


@pytest.mark.parametrize(
    ("torch_cls", "kw", "tower_cls", "pattern"),
    [
        (torch.optim.SGD, {"lr": 0.1, "momentum": 0.9}, TowerAdam, "betas"),
        (torch.optim.Adam, {"lr": 0.1}, TowerSGD, "momentum"),
        (torch.optim.Adam, {"lr": 0.1, "weight_decay": 0.01}, TowerAdamW, "TowerAdam,"),
        (torch.optim.AdamW, {"lr": 0.1}, TowerAdam, "TowerAdamW,"),
        (torch.optim.Adam, {"lr": 0.1, "amsgrad": True}, TowerAdam, "amsgrad"),
    ],
    ids=["sgd_into_adam", "adam_into_sgd", "adam_into_adamw", "adamw_into_adam", "amsgrad"],
)
def test_checkpoint_of_another_base_is_refused_at_load(
    torch_cls: type[Any], kw: dict[str, Any], tower_cls: type[Any], pattern: str
) -> None:
    params = _params()
    source = torch_cls(params, **kw)
    _train(source, params, _batches()[:2])
    opt = tower_cls(_params())
    with pytest.raises(ValueError, match=pattern):
        opt.load_state_dict(source.state_dict())


def test_adam_checkpoint_without_weight_decay_loads_into_adamw() -> None:
    """Without decay Adam and AdamW are one rule: the checkpoint's weight_decay=0 wins."""
    params = _params()
    source = torch.optim.Adam(params, lr=0.1)
    _train(source, params, _batches()[:2])
    opt = TowerAdamW(_params())  # constructed with AdamW's default decay 1e-2
    opt.load_state_dict(source.state_dict())
    assert opt.param_groups[0]["weight_decay"] == 0


# ----------------------------------------------------------------------------- item: older tower checkpoints


def _drop_group_key(ckpt: Any, key: str) -> Any:
    out = copy.deepcopy(ckpt)
    for group in out["param_groups"]:
        del group[key]
    return out


@pytest.mark.parametrize(
    ("make", "expected"),
    [
        (lambda ps: TowerAdam(ps, lr=1e-2), [DEFAULT_ADAM_HORIZON]),
        # Per group: SGD 0.99 (options.default_horizon), with or without momentum.
        (
            lambda ps: TowerSGD([{"params": ps[:2]}, {"params": ps[2:], "momentum": 0.9}], lr=0.05),
            [DEFAULT_HORIZON, DEFAULT_HORIZON],
        ),
    ],
    ids=["adam", "sgd_two_groups"],
)
def test_checkpoint_without_horizon_loads_the_measured_default(
    make: Callable[[list[Tensor]], Any], expected: list[float]
) -> None:
    """Reference: the uninterrupted run of the same optimizer (bitwise); a horizon of 0.0
    in its place changes the learned step size and the weights."""
    batches = _batches()[: 2 * BEFORE]
    params = _params()
    opt = make(params)
    _train(opt, params, batches[:BEFORE])
    weights, ckpt = [p.detach().clone() for p in params], _roundtrip(opt.state_dict())
    _train(opt, params, batches[BEFORE:])
    old = _drop_group_key(ckpt, "horizon")  # as saved before the option existed
    resumed_params, resumed = _resume(weights, make, old)
    assert [g["horizon"] for g in resumed.param_groups] == expected
    _train(resumed, resumed_params, batches[BEFORE:])
    assert resumed.step_sizes() == opt.step_sizes()
    for p, q in zip(resumed_params, params, strict=True):
        assert torch.equal(p.detach(), q.detach())


# ----------------------------------------------------------------------------- item: a number as Adam's step


@pytest.mark.parametrize("as_number", [float, int], ids=["float", "int"])
@pytest.mark.parametrize("depth", [0, None], ids=["depth0", "defaults"])
def test_number_as_adam_step_is_converted_as_torch_does(as_number: type, depth: int | None) -> None:
    kw: dict[str, Any] = {"lr": 1e-2}
    weights, ckpt = _torch_checkpoint(torch.optim.Adam, kw)
    edited = copy.deepcopy(ckpt)
    for st in edited["state"].values():
        st["step"] = as_number(st["step"].item())  # older or hand-edited checkpoints
    after = _batches()[BEFORE : BEFORE + AFTER]
    # reference: torch.optim.Adam on the edited checkpoint (converts the number)
    ref_params, ref = _resume(weights, lambda ps: torch.optim.Adam(ps, fused=True, **kw), edited)
    _train(ref, ref_params, after)
    # the tower on the edited checkpoint equals the tower on the original one
    same_params, same = _resume(weights, lambda ps: TowerAdam(ps, depth=depth, **kw), ckpt)
    _train(same, same_params, after)
    params, opt = _resume(weights, lambda ps: TowerAdam(ps, depth=depth, **kw), edited)
    step = opt.state[params[0]]["step"]
    assert isinstance(step, Tensor) and step.dtype == torch.float32 and float(step) == BEFORE
    _train(opt, params, after)
    for p, q, r in zip(params, same_params, ref_params, strict=True):
        assert torch.equal(p.detach(), q.detach())
        if depth == 0:
            assert torch.equal(p.detach(), r.detach())
    assert float(opt.state[params[0]]["step"]) == float(ref.state[ref_params[0]]["step"]) == BEFORE + AFTER


# ----------------------------------------------------------------------------- item: hooks that add keys


def _add_keys_with_hooks(opt: torch.optim.Optimizer) -> None:
    """The documented hooks, each adding a key beside the parameters' entries."""

    def pre(o: torch.optim.Optimizer) -> None:
        o.state["saved_at_step"] = 7  # type: ignore[index]  # torch keeps non-parameter keys

    def post(o: torch.optim.Optimizer, sd: dict[str, Any]) -> dict[str, Any]:
        sd["state"]["note"] = {"origin": torch.tensor(1.0)}
        sd["extra"] = "kept"
        return sd

    def load_pre(o: torch.optim.Optimizer, sd: dict[str, Any]) -> dict[str, Any]:
        return {**sd, "state": {**sd["state"], "loaded": True}}

    def load_post(o: torch.optim.Optimizer) -> None:
        o.state["resumed"] = True  # type: ignore[index]

    opt.register_state_dict_pre_hook(pre)
    opt.register_state_dict_post_hook(post)
    opt.register_load_state_dict_pre_hook(load_pre)
    opt.register_load_state_dict_post_hook(load_post)


@pytest.mark.parametrize(
    "make",
    [
        lambda ps: torch.optim.Adam(ps, lr=1e-2),
        lambda ps: TowerAdam(ps, lr=1e-2),
        lambda ps: TowerAdam(ps, lr=1e-2, depth=0),
        lambda ps: TowerSGD(ps, lr=0.05, momentum=0.9),
    ],
    ids=["torch_adam_reference", "adam", "adam_depth0", "sgd"],
)
def test_state_dict_hooks_that_add_keys_round_trip(make: Callable[[list[Tensor]], Any]) -> None:
    """Reference: torch.optim.Adam keeps the added keys (first row); the tower must as well,
    and the parameters' entries resume exactly as without hooks."""
    batches = _batches()[: 2 * BEFORE]
    params = _params()
    opt = make(params)
    _add_keys_with_hooks(opt)
    _train(opt, params, batches[:BEFORE])
    sd = _roundtrip(opt.state_dict())
    assert sd["state"]["saved_at_step"] == 7 and float(sd["state"]["note"]["origin"]) == 1.0
    assert sd["extra"] == "kept"
    weights = [p.detach().clone() for p in params]
    _train(opt, params, batches[BEFORE:])
    resumed_params, resumed = _resume(weights, lambda ps: _hooked(make(ps)), sd)
    assert resumed.state["loaded"] is True and resumed.state["resumed"] is True
    assert resumed.state["saved_at_step"] == 7
    _train(resumed, resumed_params, batches[BEFORE:])
    again = resumed.state_dict()  # the loaded extra keys are handed out again
    assert again["state"]["loaded"] is True and again["state"]["resumed"] is True
    for p, q in zip(resumed_params, params, strict=True):
        assert torch.equal(p.detach(), q.detach())


def _hooked(opt: torch.optim.Optimizer) -> torch.optim.Optimizer:
    _add_keys_with_hooks(opt)
    return opt
