"""Invalid options are rejected at construction and in ``add_param_group``; depth 0 is torch.optim, defaults included.

References: ``torch.optim``'s own argument checks (``ValueError`` naming the argument) for the
validation (common practice for a drop-in optimizer), and ``torch.optim.SGD`` / ``Adam`` /
``AdamW`` with all their defaults for ``depth=0`` (``torch.equal`` on weights and state).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import pytest
import torch
from torch import nn

from stepsize_tower import TowerAdam, TowerAdamW, TowerSGD

CLASSES = {"sgd": TowerSGD, "adam": TowerAdam, "adamw": TowerAdamW}


def _p(dtype: torch.dtype = torch.float32) -> list[nn.Parameter]:
    return [nn.Parameter(torch.zeros(2, dtype=dtype))]


#: (id, classes, option, invalid value, regex naming the option and what is accepted)
INVALID: list[tuple[str, tuple[str, ...], str, Any, str]] = [
    ("granularity", ("sgd", "adam"), "granularity", "bogus", r"granularity.*'bogus'.*'group'.*'tensor'"),
    ("retreat", ("sgd", "adam", "adamw"), "retreat", "yes", r"retreat.*'yes'.*True or False"),
    ("fused adam", ("adam", "adamw"), "fused", "x", r"fused.*'x'.*True, False or None"),
    ("fused sgd", ("sgd",), "fused", "x", r"fused.*'x'.*True, False or None"),
    ("lr vector", ("sgd", "adam"), "lr", torch.tensor([0.1, 0.2]), r"(?i)learning rate.*one number|single"),
    ("horizon", ("sgd", "adam"), "horizon", 1.5, r"horizon.*1\.5"),
    ("first_step_limit", ("adam",), "first_step_limit", -1.0, r"first_step_limit.*-1"),
    ("growth_search", ("sgd", "adam"), "growth_search", 2.0, r"growth_search.*2\.0"),
    ("momentum", ("sgd",), "momentum", 1.5, r"momentum.*1\.5"),
    ("dampening", ("sgd",), "dampening", -0.5, r"dampening.*-0\.5"),
    ("weight_decay", ("sgd", "adam"), "weight_decay", -1.0, r"weight_decay.*-1"),
    ("eps", ("adam",), "eps", -1.0, r"(?i)epsilon.*-1"),
    ("betas range", ("adam",), "betas", (1.0, 0.9), r"betas.*\[0, 1\)"),
    ("betas mixed", ("adam", "adamw"), "betas", (0.9, torch.tensor(0.999)), r"betas.*both floats or both tensors"),
    ("compiled", ("adam",), "compiled", 1, r"compiled.*1.*True or False"),
    ("sharded", ("sgd", "adam"), "sharded", "yes", r"sharded.*'yes'.*True, False or None"),
    ("maximize", ("sgd", "adam"), "maximize", "no", r"maximize.*'no'.*True or False"),
    ("nesterov", ("sgd",), "nesterov", 1, r"nesterov.*1.*True or False"),
    ("learn_momentum", ("sgd",), "learn_momentum", "on", r"learn_momentum.*'on'.*True or False"),
    ("learn_betas", ("adam",), "learn_betas", "on", r"learn_betas.*'on'.*True or False"),
]

CASES = [(case, cls, option, value, pattern) for case, classes, option, value, pattern in INVALID for cls in classes]


@pytest.mark.parametrize(("case", "cls", "option", "value", "pattern"), CASES, ids=[f"{c[0]}-{c[1]}" for c in CASES])
def test_invalid_option_is_rejected_at_construction(case: str, cls: str, option: str, value: Any, pattern: str) -> None:
    with pytest.raises(ValueError, match=pattern):
        CLASSES[cls](_p(), **{option: value})


@pytest.mark.parametrize(("case", "cls", "option", "value", "pattern"), CASES, ids=[f"{c[0]}-{c[1]}" for c in CASES])
def test_invalid_option_is_rejected_by_add_param_group(
    case: str, cls: str, option: str, value: Any, pattern: str
) -> None:
    opt = CLASSES[cls](_p())
    groups_before = len(opt.param_groups)
    with pytest.raises(ValueError, match=pattern):
        opt.add_param_group({"params": _p(), option: value})
    assert len(opt.param_groups) == groups_before


@pytest.mark.parametrize("cls", CLASSES.values(), ids=CLASSES.keys())
def test_group_depth_is_validated_and_applied(cls: type) -> None:
    opt = cls(_p())
    with pytest.raises(ValueError, match=r"depth.*-1.*>= ?0"):
        opt.add_param_group({"params": _p(), "depth": -1})
    with pytest.raises(ValueError, match=r"levels.*'rmsprop'"):
        opt.add_param_group({"params": _p(), "levels": ["rmsprop"]})
    opt.add_param_group({"params": _p(), "depth": 0})
    assert opt.param_groups[-1]["levels"] == [] and "depth" not in opt.param_groups[-1]
    opt.add_param_group({"params": _p(), "depth": 2})
    assert len(opt.param_groups[-1]["levels"]) == 2


@pytest.mark.parametrize("cls", CLASSES.values(), ids=CLASSES.keys())
def test_complex_parameters_are_rejected_at_construction_and_in_add_param_group(cls: type) -> None:
    with pytest.raises(ValueError, match=r"complex.*view_as_real"):
        cls(_p(torch.complex64))
    opt = cls(_p())
    with pytest.raises(ValueError, match=r"complex.*view_as_real"):
        opt.add_param_group({"params": _p(torch.complex64)})


@pytest.mark.parametrize("cls", CLASSES.values(), ids=CLASSES.keys())
def test_sparse_gradients_are_rejected_with_the_fix(cls: type) -> None:
    emb = nn.Embedding(5, 3, sparse=True)
    opt = cls(emb.parameters())
    emb(torch.tensor([1, 2])).sum().backward()
    with pytest.raises(RuntimeError, match=r"sparse gradients.*sparse=False"):
        opt.step()


# --------------------------------------------------------------------------- depth 0 == torch.optim, defaults included

PAIRS: list[tuple[str, Callable[..., Any], Callable[..., Any]]] = [
    ("sgd", lambda ps: TowerSGD(ps, depth=0), lambda ps: torch.optim.SGD(ps)),
    ("adam", lambda ps: TowerAdam(ps, depth=0), lambda ps: torch.optim.Adam(ps)),
    ("adamw", lambda ps: TowerAdamW(ps, depth=0), lambda ps: torch.optim.AdamW(ps)),
]


def _train(make: Callable[..., Any], steps: int = 8) -> tuple[list[torch.Tensor], Any]:
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(4, 3), nn.Tanh(), nn.Linear(3, 1))
    opt = make(model.parameters())
    gen = torch.Generator().manual_seed(1)
    for _ in range(steps):
        x = torch.randn(6, 4, generator=gen)
        opt.zero_grad()
        model(x).pow(2).mean().backward()
        opt.step()
    return [p.detach().clone() for p in model.parameters()], opt.state_dict()


@pytest.mark.parametrize(("name", "ours", "theirs"), PAIRS, ids=[p[0] for p in PAIRS])
def test_depth_zero_with_all_defaults_is_torch_optim(
    name: str, ours: Callable[..., Any], theirs: Callable[..., Any]
) -> None:
    got, got_state = _train(ours)
    want, want_state = _train(theirs)
    for w, ref in zip(got, want, strict=True):
        assert torch.equal(w, ref)
    assert sorted(got_state["state"]) == sorted(want_state["state"])  # no extra (empty) entries
    for index, ref_state in want_state["state"].items():
        assert sorted(got_state["state"][index]) == sorted(ref_state)
        for key, value in ref_state.items():
            assert torch.equal(got_state["state"][index][key], value), (index, key)
    assert got_state["param_groups"][0]["lr"] == want_state["param_groups"][0]["lr"]
