"""The drop-in contract of a ``torch.optim.Optimizer``, checked for every registry entry.

Table-driven in the style of torch's own optimizer tests: each behaviour is one test,
parametrized over :data:`tests.registry.CONFIGS`. The contract is torch.optim.Optimizer's
documented behaviour: ``step(closure)`` runs the closure under grad and returns its loss;
parameters whose ``.grad`` is None are skipped; ``state_dict`` / ``load_state_dict`` resume
exactly (through ``torch.load(weights_only=True)``); deepcopy and pickle keep everything;
schedulers own ``group["lr"]`` (here the outer factor on the learned step size).
``tests/test_contract_table.py`` checks the same against torch.optim for every public class.
"""

from __future__ import annotations

import copy
import io
import math
import pickle
from collections.abc import Callable
from typing import Any

import pytest
import torch
from registry import BY_NAME, CONFIGS, Config, parametrize_configs
from torch import Tensor, nn
from torch.optim import Optimizer
from torch.optim.lr_scheduler import CosineAnnealingLR, LambdaLR, OneCycleLR

from stepsize_tower import Level, TowerAdam, TowerAdamW, TowerSGD, make_tower

N_IN, N_HIDDEN, BATCH = 5, 4, 16


# ---------------------------------------------------------------------------- helpers


def make_model(seed: int = 0, dtype: torch.dtype = torch.float32) -> nn.Module:
    """A small two-layer tanh network (four parameter tensors)."""
    torch.manual_seed(seed)
    return nn.Sequential(nn.Linear(N_IN, N_HIDDEN), nn.Tanh(), nn.Linear(N_HIDDEN, 1)).to(dtype)


def batch(step: int, dtype: torch.dtype = torch.float32) -> tuple[Tensor, Tensor]:
    """A deterministic regression batch for step ``step`` (a different one each step)."""
    gen = torch.Generator().manual_seed(1000 + step)
    x = torch.randn(BATCH, N_IN, generator=gen)
    y = x[:, :1].sin() + 0.1 * torch.randn(BATCH, 1, generator=gen)
    return x.to(dtype), y.to(dtype)


def loss_of(model: nn.Module, step: int) -> Tensor:
    x, y = batch(step, next(model.parameters()).dtype)
    return ((model(x) - y) ** 2).mean()


def train(model: nn.Module, opt: Optimizer, steps: range) -> list[float]:
    """Plain training loop (zero_grad / backward / step); returns the losses."""
    losses = []
    for s in steps:
        opt.zero_grad()
        loss = loss_of(model, s)
        loss.backward()
        opt.step()
        losses.append(loss.item())
    return losses


def depth_of(group: dict[str, Any]) -> int:
    return len(group["levels"])


def assert_states_equal(a: Optimizer, b: Optimizer, ignore: tuple[str, ...] = ()) -> None:
    """Bitwise equality of per-parameter state and of every group's learned tower state."""
    for pa, pb in zip(
        (p for g in a.param_groups for p in g["params"]),
        (p for g in b.param_groups for p in g["params"]),
        strict=True,
    ):
        sa, sb = a.state.get(pa, {}), b.state.get(pb, {})
        assert sa.keys() == sb.keys()
        for key in sa:
            if isinstance(sa[key], Tensor):
                assert torch.equal(sa[key], sb[key]), key
            else:
                assert sa[key] == sb[key], key
    for ga, gb in zip(a.param_groups, b.param_groups, strict=True):
        ta, tb = ga.get("tower"), gb.get("tower")
        assert (ta is None) == (tb is None)
        if ta is not None:
            assert ta.keys() == tb.keys()
            for key in ta.keys() - set(ignore):
                assert torch.equal(ta[key], tb[key]), key


def assert_params_equal(a: nn.Module, b: nn.Module) -> None:
    for pa, pb in zip(a.parameters(), b.parameters(), strict=True):
        assert torch.equal(pa, pb)


# ---------------------------------------------------------------------------- descent


QUADRATIC_XFAIL = {
    "adam_depth3_tensor": "measured at c0e552a and again after the fused-kernel layout fix: loss 15 -> 2.53 "
    "after 200 steps (needs < 1.5); the other 19 entries pass",
}


@pytest.mark.parametrize(
    "config",
    [
        pytest.param(c, marks=[pytest.mark.xfail(strict=True, raises=AssertionError, reason=QUADRATIC_XFAIL[c.name])])
        if c.name in QUADRATIC_XFAIL
        else c
        for c in CONFIGS
    ],
    ids=[c.name for c in CONFIGS],
)
def test_goes_downhill_on_a_quadratic(config: Config) -> None:
    # An ill-conditioned separable quadratic over a matrix and a vector (curvatures 0.5 .. 5).
    gen = torch.Generator().manual_seed(0)
    w = torch.zeros(3, 4, requires_grad=True)
    b = torch.zeros(5, requires_grad=True)
    target_w, target_b = torch.randn(3, 4, generator=gen), torch.randn(5, generator=gen)
    curv_w, curv_b = torch.linspace(0.5, 5.0, 12).reshape(3, 4), torch.linspace(0.5, 5.0, 5)

    def loss_fn() -> Tensor:
        return 0.5 * ((curv_w * (w - target_w) ** 2).sum() + (curv_b * (b - target_b) ** 2).sum())

    opt = config.factory([w, b])
    initial = loss_fn().item()
    for _ in range(200):
        opt.zero_grad()
        loss_fn().backward()
        opt.step()
    final = loss_fn().item()
    assert math.isfinite(final)
    assert final < 0.1 * initial, f"{config.name}: loss {initial:.4g} -> {final:.4g}"


@parametrize_configs()
def test_step_runs_closure_under_grad_and_returns_its_loss(config: Config) -> None:
    model = make_model()
    opt = config.factory(model.parameters())
    seen: list[bool] = []
    returned: list[Tensor] = []

    def closure() -> Tensor:
        seen.append(torch.is_grad_enabled())
        opt.zero_grad()
        loss = loss_of(model, 0)
        loss.backward()
        returned.append(loss)
        return loss

    before = [p.detach().clone() for p in model.parameters()]
    with torch.no_grad():  # the optimizer must turn grad back on for the closure
        out = opt.step(closure)
    assert seen == [True]
    assert out is returned[0]
    assert any(not torch.equal(p0, p) for p0, p in zip(before, model.parameters(), strict=True))


@parametrize_configs()
def test_parameters_without_grad_are_left_alone(config: Config) -> None:
    used = nn.Parameter(torch.randn(4, 3))
    unused = nn.Parameter(torch.randn(3))
    opt = config.factory([used, unused])
    unused_before = unused.detach().clone()
    for s in range(3):
        opt.zero_grad()  # set_to_none=True is the default
        assert used.grad is None and unused.grad is None
        x, _ = batch(s)
        (x[:, :4] @ used).pow(2).mean().backward()
        opt.step()
    assert unused.grad is None
    assert torch.equal(unused, unused_before)
    assert len(opt.state[unused]) == 0

    # After zero_grad(set_to_none=True) no parameter has a gradient: step changes nothing.
    opt.zero_grad(set_to_none=True)
    params_before = [used.detach().clone(), unused.detach().clone()]
    state_before = copy.deepcopy(opt.state_dict())
    opt.step()
    assert torch.equal(used, params_before[0]) and torch.equal(unused, params_before[1])
    state_after = opt.state_dict()
    for ga, gb in zip(state_before["param_groups"], state_after["param_groups"], strict=True):
        for key, value in ga.get("tower", {}).items():
            assert torch.equal(value, gb["tower"][key]), key


def _separable_loss(a: nn.Module, b: nn.Module | None, step: int) -> Tensor:
    loss = loss_of(a, step)
    if b is not None:
        loss = loss + loss_of(b, step + 500)
    return loss


@parametrize_configs()
def test_param_groups_learn_independently(config: Config) -> None:
    # Two models in two groups (the second added with add_param_group and its own lr),
    # trained on a separable loss: the first group must follow exactly the trajectory it
    # follows alone, and each group keeps its own learned state.
    a_both, b_both, a_alone = make_model(0), make_model(1), make_model(0)
    opt_both = config.factory(a_both.parameters())
    opt_both.add_param_group({"params": list(b_both.parameters()), "lr": 0.003})
    opt_alone = config.factory(a_alone.parameters())
    for s in range(12):
        for model_a, model_b, opt in ((a_both, b_both, opt_both), (a_alone, None, opt_alone)):
            opt.zero_grad()
            _separable_loss(model_a, model_b, s).backward()
            opt.step()
    assert_params_equal(a_both, a_alone)
    g0, g1 = opt_both.param_groups
    for key, value in opt_alone.param_groups[0]["tower"].items():
        assert torch.equal(g0["tower"][key], value), key
    assert g0["tower"] is not g1["tower"]
    assert all(g0["tower"][k] is not g1["tower"][k] for k in g0["tower"])
    sizes = opt_both.step_sizes()
    assert len(sizes) == 2
    assert sizes[0] == opt_alone.step_sizes()[0]
    assert sizes[0][0] != sizes[1][0]


@parametrize_configs()
def test_add_param_group_later_starts_fresh(config: Config) -> None:
    a, b = make_model(0), make_model(1)
    opt = config.factory(a.parameters())
    train(a, opt, range(4))
    opt.add_param_group({"params": list(b.parameters())})
    new_group = opt.param_groups[1]
    assert "tower" not in new_group or new_group["tower"] is not opt.param_groups[0]["tower"]
    # Before the new group's first step its step size is its lr (times exp(0)).
    assert opt.step_sizes()[1][0] == pytest.approx(new_group["lr"], rel=1e-12)
    for s in range(3):
        opt.zero_grad()
        _separable_loss(a, b, s).backward()
        opt.step()
    assert opt.param_groups[1]["tower"]["step"].item() + opt.param_groups[1]["tower"]["skipped"].item() == 3


# ---------------------------------------------------------------------------- state


def _roundtrip(obj: Any) -> Any:
    buffer = io.BytesIO()
    torch.save(obj, buffer)
    buffer.seek(0)
    return torch.load(buffer, weights_only=True)


@parametrize_configs()
def test_state_dict_resume_is_bit_exact(config: Config) -> None:
    n, m = 6, 6
    # Uninterrupted run of n + m steps.
    model_ref = make_model(0)
    opt_ref = config.factory(model_ref.parameters())
    train(model_ref, opt_ref, range(n + m))

    # n steps, checkpoint through bytes (weights_only=True), resume in fresh objects.
    model_a = make_model(0)
    opt_a = config.factory(model_a.parameters())
    train(model_a, opt_a, range(n))
    checkpoint = _roundtrip({"model": model_a.state_dict(), "optimizer": opt_a.state_dict()})
    model_b = make_model(7)  # a different init: everything must come from the checkpoint
    model_b.load_state_dict(checkpoint["model"])
    opt_b = config.factory(model_b.parameters())
    opt_b.load_state_dict(checkpoint["optimizer"])
    assert_states_equal(opt_a, opt_b)
    assert opt_b.step_sizes() == opt_a.step_sizes()
    train(model_b, opt_b, range(n, n + m))

    assert_params_equal(model_b, model_ref)
    assert_states_equal(opt_b, opt_ref)
    assert opt_b.step_sizes() == opt_ref.step_sizes()


@parametrize_configs()
@pytest.mark.parametrize("how", ["deepcopy", "pickle"])
def test_copy_of_optimizer_continues_identically(config: Config, how: str) -> None:
    model = make_model(0)
    opt = config.factory(model.parameters())
    train(model, opt, range(4))
    # Copy model and optimizer together so the copy's groups point at the copied parameters.
    if how == "deepcopy":
        model2, opt2 = copy.deepcopy((model, opt))
    else:
        model2, opt2 = pickle.loads(pickle.dumps((model, opt)))
    assert type(opt2) is type(opt)
    assert opt2.step_sizes() == opt.step_sizes()
    assert opt2.param_groups[0]["tower"] is not opt.param_groups[0]["tower"]
    assert_states_equal(opt, opt2)
    train(model, opt, range(4, 8))
    train(model2, opt2, range(4, 8))
    assert_params_equal(model, model2)
    assert_states_equal(opt, opt2)


DTYPE_CONFIGS = [BY_NAME[n] for n in ("sgd_momentum", "sgd_depth3_mixed", "adam", "adam_unfused", "adamw")]


@parametrize_configs(configs=DTYPE_CONFIGS)
@pytest.mark.parametrize("dtype", [torch.float32, torch.float64, torch.bfloat16], ids=str)
def test_dtype_of_params_and_state_is_kept(config: Config, dtype: torch.dtype) -> None:
    model = make_model(0, dtype)
    opt = config.factory(model.parameters())
    train(model, opt, range(5))

    def check(o: Optimizer, m: nn.Module) -> None:
        for p in m.parameters():
            assert p.dtype == dtype
            for key, value in o.state[p].items():
                if isinstance(value, Tensor) and value.is_floating_point() and value.shape == p.shape:
                    assert value.dtype == dtype, key
        for group in o.param_groups:
            for key, value in group["tower"].items():
                assert value.dtype == torch.float64, key
        assert all(type(x) is float for sizes in o.step_sizes() for x in sizes)

    check(opt, model)
    model2 = make_model(3, dtype)
    model2.load_state_dict(model.state_dict())
    opt2 = config.factory(model2.parameters())
    opt2.load_state_dict(_roundtrip(opt.state_dict()))
    check(opt2, model2)
    assert opt2.step_sizes() == opt.step_sizes()
    train(model2, opt2, range(5, 7))
    check(opt2, model2)
    assert all(torch.isfinite(p).all() for p in model2.parameters())


# ---------------------------------------------------------------------------- skipped steps


@parametrize_configs()
@pytest.mark.parametrize("bad", [math.inf, -math.inf, math.nan], ids=["inf", "-inf", "nan"])
def test_non_finite_gradient_skips_the_step(config: Config, bad: float) -> None:
    model = make_model(0)
    opt = config.factory(model.parameters())
    train(model, opt, range(4))
    assert opt.skipped_steps() == 0
    params_before = [p.detach().clone() for p in model.parameters()]
    opt_before = copy.deepcopy(opt)

    opt.zero_grad()
    loss_of(model, 4).backward()
    first = next(model.parameters())
    first.grad.view(-1)[1] = bad
    opt.step()

    for p0, p in zip(params_before, model.parameters(), strict=True):
        assert torch.equal(p0, p)
    assert_states_equal(opt_before, opt, ignore=("skipped",))
    assert opt.param_groups[0]["lr"] == opt_before.param_groups[0]["lr"]
    assert opt.skipped_steps() == 1

    # The next finite gradient is taken as usual.
    train(model, opt, range(5, 6))
    assert opt.skipped_steps() == 1
    assert any(not torch.equal(p0, p) for p0, p in zip(params_before, model.parameters(), strict=True))


# ---------------------------------------------------------------------------- schedulers


_BASE_KEYS = ("momentum_buffer", "exp_avg", "exp_avg_sq", "step")


def _torch_step(
    opt: Optimizer, group: dict[str, Any], w: Tensor, state: dict[str, Tensor], g: Tensor, lr: float
) -> Tensor:
    """torch.optim's own step (SGD / Adam / AdamW, the group's settings) from ``w`` and ``state`` at ``lr``."""
    p = w.clone().requires_grad_()
    if isinstance(opt, TowerSGD):
        keys = ("momentum", "dampening", "nesterov", "weight_decay", "maximize")
        ref: Optimizer = torch.optim.SGD([p], lr=lr, foreach=False, **{k: group[k] for k in keys})
    else:
        cls = torch.optim.AdamW if isinstance(opt, TowerAdamW) else torch.optim.Adam
        keys = ("betas", "eps", "weight_decay", "maximize")
        ref = cls([p], lr=lr, foreach=False, **{k: group[k] for k in keys})
    if state:
        ref.state[p] = {k: v.clone() for k, v in state.items()}
    p.grad = g.clone()
    ref.step()
    return p.detach()


def _learned_factor(opt: Optimizer, g: int = 0) -> float:
    return math.exp(opt.param_groups[g]["tower"]["log_step"][0, 0].item()) if depth_of(opt.param_groups[g]) else 1.0


SCHEDULERS: dict[str, Callable[[Optimizer, int], Any]] = {
    "LambdaLR": lambda opt, total: LambdaLR(opt, lambda t: 1.0 / (1.0 + 0.5 * t)),
    "OneCycleLR": lambda opt, total: OneCycleLR(opt, max_lr=0.05, total_steps=total, cycle_momentum=False),
    "CosineAnnealingLR": lambda opt, total: CosineAnnealingLR(opt, T_max=total, eta_min=1e-4),
}


def _expected_lr(name: str, t: int, total: int, base_lr: float) -> float:
    """The scheduler's closed form after ``t`` scheduler steps (torch's documented formulas)."""
    if name == "LambdaLR":
        return base_lr / (1.0 + 0.5 * t)
    if name == "CosineAnnealingLR":
        return 1e-4 + (base_lr - 1e-4) * (1 + math.cos(math.pi * t / total)) / 2
    # OneCycleLR, cosine annealing: warm up from max_lr/25 to max_lr over 30 % of the steps,
    # then down to max_lr/25/1e4 (torch defaults pct_start=0.3, div_factor=25, final_div_factor=1e4).
    max_lr, initial, final = 0.05, 0.05 / 25, 0.05 / 25 / 1e4
    up_end = 0.3 * total - 1
    if t <= up_end:
        pct, start, end = t / up_end, initial, max_lr
    else:
        pct, start, end = (t - up_end) / (total - 1 - up_end), max_lr, final
    return end + (start - end) / 2.0 * (math.cos(math.pi * pct) + 1)


@parametrize_configs(configs=[BY_NAME[n] for n in ("sgd", "sgd_momentum", "adam", "adamw_unfused_tensor_depth2")])
@pytest.mark.parametrize("scheduler", list(SCHEDULERS))
def test_scheduler_rescales_the_learned_step_size(config: Config, scheduler: str) -> None:
    total = 20
    model = make_model(0)
    opt = config.factory(model.parameters())
    base_lr = opt.param_groups[0]["lr"]
    sched = SCHEDULERS[scheduler](opt, total)
    plain_sgd = config.name == "sgd"
    for t in range(total):
        group = opt.param_groups[0]
        assert group["lr"] == pytest.approx(_expected_lr(scheduler, t, total, base_lr), rel=1e-9)
        params_before = [p.detach().clone() for p in model.parameters()]
        base_state = [{k: v.clone() for k, v in opt.state[p].items() if k in _BASE_KEYS} for p in model.parameters()]
        retreats_before = opt.retreats()
        opt.zero_grad()
        loss_of(model, t).backward()
        grads = [p.grad.clone() for p in model.parameters()]
        opt.step()

        # The step size reported is the one the weights moved by: torch.optim's step from the same
        # state at that step size (per tensor with granularity="tensor") gives the same weights.
        sizes = opt.step_sizes()
        per_unit = opt.step_size_tensors()[0][:, 0]
        if opt.retreats() == retreats_before:
            for i, (p0, p, g, st) in enumerate(zip(params_before, model.parameters(), grads, base_state, strict=True)):
                a = float(per_unit[i if per_unit.numel() > 1 else 0])
                torch.testing.assert_close(p.detach(), _torch_step(opt, group, p0, st, g, a), rtol=1e-5, atol=1e-7)
        if plain_sgd and opt.retreats() == retreats_before:
            # Plain SGD moves by exactly a_0 * g: the scheduled lr reaches the weights.
            for p0, p, g in zip(params_before, model.parameters(), grads, strict=True):
                torch.testing.assert_close(p0 - p, sizes[0][0] * g, rtol=1e-5, atol=1e-7)

        # The scheduler rewrites lr; the learned factor survives it untouched.
        factor = _learned_factor(opt)
        ratio_before = sizes[0][0] / group["lr"]
        sched.step()
        assert _learned_factor(opt) == factor
        assert opt.step_sizes()[0][0] / group["lr"] == pytest.approx(ratio_before, rel=1e-12)
    if depth_of(opt.param_groups[0]):
        log_step = opt.param_groups[0]["tower"]["log_step"][:, 0]
        assert (log_step != 0).any(), "the tower learned nothing, so the checks above were vacuous"


# ---------------------------------------------------------------------------- maximize


@parametrize_configs()
def test_maximize_flips_the_direction(config: Config) -> None:
    # Maximizing -L must follow exactly the trajectory of minimizing L.
    model_min, model_max = make_model(0), make_model(0)
    opt_min = config.factory(model_min.parameters())
    opt_max = config.factory(model_max.parameters())
    for group in opt_max.param_groups:
        group["maximize"] = True
    start = loss_of(model_max, 0).item()
    for s in range(10):
        opt_min.zero_grad()
        loss_of(model_min, s).backward()
        opt_min.step()
        opt_max.zero_grad()
        (-loss_of(model_max, s)).backward()
        opt_max.step()
    assert_params_equal(model_min, model_max)
    assert opt_min.step_sizes() == opt_max.step_sizes()
    # And maximizing L itself goes uphill.
    model_up = make_model(0)
    opt_up = config.factory(model_up.parameters())
    for group in opt_up.param_groups:
        group["maximize"] = True
    for _ in range(10):
        opt_up.zero_grad()
        loss_of(model_up, 0).backward()
        opt_up.step()
    assert loss_of(model_up, 0).item() > start


# ---------------------------------------------------------------------------- torch.compile


@parametrize_configs(configs=[BY_NAME["sgd_momentum"], BY_NAME["adam"]])
def test_compiled_step_does_not_recompile_as_step_sizes_change(config: Config) -> None:
    # Dynamo guards decide recompilation whatever the backend; "eager" keeps this fast and
    # needs no C++ compiler. After warm-up (state is created lazily in the first steps),
    # changing step sizes must hit the cached graphs: error_on_recompile turns any
    # recompile into an error, fail_on_recompile_limit_hit stops a silent eager fallback.
    torch._dynamo.reset()
    model_c, model_e = make_model(0), make_model(0)
    opt_c = config.factory(model_c.parameters())
    opt_e = config.factory(model_e.parameters())

    @torch.compile(backend="eager")
    def compiled_step() -> None:
        opt_c.step()

    def one_step(s: int) -> None:
        for model, opt, step in ((model_c, opt_c, compiled_step), (model_e, opt_e, opt_e.step)):
            opt.zero_grad()
            loss_of(model, s).backward()
            step()

    try:
        with torch._dynamo.config.patch(fail_on_recompile_limit_hit=True):
            for s in range(3):
                one_step(s)
            sizes_after_warmup = opt_c.step_sizes()
            with torch._dynamo.config.patch(error_on_recompile=True):
                for s in range(3, 10):
                    one_step(s)
    finally:
        torch._dynamo.reset()
    assert opt_c.step_sizes()[0][0] != sizes_after_warmup[0][0]
    # Compiled and eager steps agree.
    for pc, pe in zip(model_c.parameters(), model_e.parameters(), strict=True):
        torch.testing.assert_close(pc, pe, rtol=1e-6, atol=1e-7)
    assert opt_c.step_sizes()[0] == pytest.approx(opt_e.step_sizes()[0], rel=1e-6)


# ---------------------------------------------------------------------------- accessors


@parametrize_configs()
def test_step_sizes_are_python_floats_level_0_first(config: Config) -> None:
    model = make_model(0)
    opt = config.factory(model.parameters())
    group = opt.param_groups[0]
    depth = depth_of(group)

    def check() -> list[float]:
        sizes = opt.step_sizes()
        assert len(sizes) == len(opt.param_groups)
        assert len(sizes[0]) == depth + 1
        assert all(type(x) is float and math.isfinite(x) and x > 0 for x in sizes[0])
        if depth:
            assert sizes[0][-1] == pytest.approx(group["levels"][-1]["lr"], rel=1e-12)  # the fixed top level
        tensors = opt.step_size_tensors()
        assert tensors[0].dtype == torch.float64 and tensors[0].shape[1] == depth + 1
        return sizes[0]

    assert check()[0] == pytest.approx(group["lr"], rel=1e-12)  # before any step: lr * exp(0)
    for k in range(1, depth):
        assert check()[k] == pytest.approx(group["levels"][k - 1]["lr"], rel=1e-12)
    train(model, opt, range(5))
    sizes = check()
    if depth == 0:
        assert sizes == [group["lr"]]
    else:
        assert sizes[0] != group["lr"]  # level 0 has been learned


# ---------------------------------------------------------------------------- validation


def _p() -> list[Tensor]:
    return [nn.Parameter(torch.zeros(2))]


INVALID: list[tuple[str, Callable[[], Any], str]] = [
    # (case, constructor, regex naming the argument and the accepted range)
    ("negative lr sgd", lambda: TowerSGD(_p(), lr=-0.1), r"(?i)learning rate.*-0\.1.*>= ?0"),
    ("negative lr adam", lambda: TowerAdam(_p(), lr=-1e-3), r"(?i)learning rate.*-0\.001.*>= ?0"),
    ("depth -1", lambda: TowerAdam(_p(), depth=-1), r"depth.*-1.*>= ?0"),
    ("depth -1 make_tower", lambda: make_tower(_p(), "sgd", -1), r"depth.*-1.*>= ?0"),
    ("betas (1.0, 0.9)", lambda: TowerAdam(_p(), betas=(1.0, 0.9)), r"betas.*\(1\.0, 0\.9\).*\[0, 1\)"),
    ("betas adamw", lambda: TowerAdamW(_p(), betas=(1.0, 0.9)), r"betas.*\(1\.0, 0\.9\).*\[0, 1\)"),
    (
        "level kind rmsprop",
        lambda: Level(kind="rmsprop"),
        r"kind.*'rmsprop'.*'sgd'.*'adam'|kind.*'rmsprop'.*'adam'.*'sgd'",
    ),
    ("levels rmsprop", lambda: TowerSGD(_p(), levels=["rmsprop"]), r"levels.*'rmsprop'.*('sgd'|'adam')"),
    ("granularity layer", lambda: TowerAdam(_p(), granularity="layer"), r"granularity.*'layer'.*'group'.*'tensor'"),
    ("granularity sgd", lambda: TowerSGD(_p(), granularity="layer"), r"granularity.*'layer'.*'group'.*'tensor'"),
    ("nesterov without momentum", lambda: TowerSGD(_p(), nesterov=True), r"(?i)nesterov.*momentum > 0"),
    ("level dict unknown key", lambda: TowerAdam(_p(), levels=[{"kind": "adam", "rate": 0.1}]), r"levels\[0\].*'rate'"),
    ("level dict bad lr", lambda: TowerAdam(_p(), levels=[{"kind": "adam", "lr": -1}]), r"level lr.*-1.*> 0"),
    ("compiled not a bool", lambda: TowerAdamW(_p(), compiled=1), r"compiled.*1.*True or False"),
]


def test_levels_given_as_dicts_equal_level_objects() -> None:
    # Levels read from JSON or YAML arrive as dicts (betas as a list).
    spec = {"kind": "adam", "lr": 0.03, "betas": [0.8, 0.99], "eps": 1e-20}
    from_dict = TowerAdam(_p(), levels=[spec])
    from_level = TowerAdam(_p(), levels=[Level(kind="adam", lr=0.03, betas=(0.8, 0.99), eps=1e-20)])
    assert from_dict.param_groups[0]["levels"] == from_level.param_groups[0]["levels"]


@pytest.mark.parametrize(("case", "build", "pattern"), INVALID, ids=[c for c, _, _ in INVALID])
def test_invalid_arguments_raise_value_error_naming_them(case: str, build: Callable[[], Any], pattern: str) -> None:
    with pytest.raises(ValueError, match=pattern):
        build()


def test_registry_covers_the_promised_configurations() -> None:
    opts = [c.factory([nn.Parameter(torch.zeros(2)), nn.Parameter(torch.zeros(3))]) for c in CONFIGS]
    groups = [o.param_groups[0] for o in opts]
    assert {type(o) for o in opts} == {TowerSGD, TowerAdam, TowerAdamW}
    assert {depth_of(g) for g in groups} == {0, 1, 2, 3}
    assert {lv["kind"] for g in groups for lv in g["levels"]} == {"adam", "sgd"}
    assert {g["granularity"] for g in groups} == {"group", "tensor"}
    assert {g.get("fused") for g in groups if "fused" in g} >= {True, False}
    sgd = [g for o, g in zip(opts, groups, strict=True) if isinstance(o, TowerSGD)]
    assert any(g["nesterov"] for g in sgd) and any(g["weight_decay"] for g in sgd)
    assert any(g["momentum"] and not g["nesterov"] for g in sgd) and any(not g["momentum"] for g in sgd)
