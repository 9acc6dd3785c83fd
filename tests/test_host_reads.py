"""After the start-up window a step reads nothing from the device; the masked steps equal the read path.

On an accelerator every device-to-host read (``aten::_local_scalar_dense``: ``.item()``,
``bool(t)``, ``int(t)``; and ``.tolist()``) stalls the launch queue and stops a step from
being captured in a CUDA graph (common practice: torch's own ``capturable`` / ``found_inf``
paths avoid them for the same reason). These tests run the accelerators' path on the CPU:
settled steps masked (``engine.MASK_ON_CPU``) and, for the counts, the level math on its
tensor path (on the CPU the tower's few scalars are otherwise Python floats, which reads CPU
memory, not a device).

Reference for the results: the CPU's default path, which keeps one read per step, compared
bitwise (``torch.equal``) on weights and every state tensor.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Callable
from typing import Any

import pytest
import torch
from torch import Tensor, nn
from torch.utils._python_dispatch import TorchDispatchMode

import stepsize_tower.engine as engine
import stepsize_tower.levels as levels
from stepsize_tower import TowerAdam, TowerAdamW, TowerSGD, make_tower
from tests.registry import CONFIGS, Config

# Stands in for an accelerator, where the native CPU kernel never runs: the reference path (conftest.py).
pytestmark = pytest.mark.usefixtures("reference_path")

_READ_OPS = (torch.ops.aten._local_scalar_dense.default, torch.ops.aten.item.default)

#: Depth 0 (the base optimizer itself) is masked from its first step on: checked against
#: torch.optim separately (``test_depth0_*``), not against its CPU read path, which is torch's
#: default kernel and rounds differently.
_DEPTH0 = [c for c in CONFIGS if "depth0" in c.name] + [
    Config("sgd_momentum_depth0", lambda p: TowerSGD(p, lr=0.05, momentum=0.9, nesterov=True, depth=0), ""),
    Config("adamw_depth0_unfused", lambda p: TowerAdamW(p, lr=1e-2, depth=0, fused=False), ""),
]
_TOWERS = [c for c in CONFIGS if "depth0" not in c.name] + [
    Config("adam_growth_search", lambda p: TowerAdam(p, lr=1e-5, growth_search=1.0), "growth search"),
    Config("adamw_no_retreat", lambda p: TowerAdamW(p, lr=1e-3, retreat=False), "no start-up test"),
    Config("sgd_plain_horizon0", lambda p: TowerSGD(p, lr=0.01, horizon=0.0), "one-step hypergradient"),
    Config("adam_tensor_fused_off", lambda p: make_tower(p, "adam", 2, lr=1e-3, granularity="tensor", fused=False), ""),
]


class _Reads(TorchDispatchMode):
    """Counts device-to-host reads dispatched to aten, plus ``Tensor.tolist`` calls (not dispatched)."""

    def __init__(self) -> None:
        super().__init__()
        self.count = Counter[str]()

    def __torch_dispatch__(self, func: Any, types: Any, args: Any = (), kwargs: Any = None) -> Any:
        if func in _READ_OPS:
            self.count[str(func)] += 1
        return func(*args, **(kwargs or {}))


@pytest.fixture(autouse=True)
def masked_on_cpu(monkeypatch: pytest.MonkeyPatch) -> None:
    """Settled steps masked as on an accelerator (CPU groups otherwise keep their free read)."""
    monkeypatch.setattr(engine, "MASK_ON_CPU", True)


@pytest.fixture
def tensor_path(monkeypatch: pytest.MonkeyPatch) -> None:
    """The level math as on an accelerator: tensor operations, no Python floats."""
    monkeypatch.setattr(levels, "HOST_MATH_MAX", 0)


@pytest.fixture
def reads(monkeypatch: pytest.MonkeyPatch) -> _Reads:
    """A read counter that also sees ``Tensor.tolist`` (which does not dispatch to aten)."""
    counter = _Reads()
    original = Tensor.tolist

    def counted(self: Tensor) -> Any:
        counter.count["tolist"] += 1
        return original(self)

    monkeypatch.setattr(Tensor, "tolist", counted)
    return counter


def _model() -> nn.Module:
    torch.manual_seed(0)
    return nn.Sequential(nn.Linear(6, 12), nn.Tanh(), nn.Linear(12, 2))


def _batch(step: int) -> tuple[Tensor, Tensor]:
    gen = torch.Generator().manual_seed(100 + step)
    x = torch.randn(16, 6, generator=gen)
    return x, torch.sin(x[:, :2] * 1.5)


Event = Callable[[int, nn.Module], None]


def _train(
    config: Config, steps: int, event: Event | None = None, reads: _Reads | None = None
) -> tuple[nn.Module, Any, list[int]]:
    """Train; ``event(step, model)`` may alter the gradients. Returns the model, optimizer and reads per step."""
    model = _model()
    opt = config.factory(model.parameters())
    per_step = []
    for step in range(steps):
        opt.zero_grad()
        x, y = _batch(step)
        nn.functional.mse_loss(model(x), y).backward()
        if event is not None:
            event(step, model)
        before = sum(reads.count.values()) if reads is not None else 0
        if reads is not None:
            with reads:
                opt.step()
        else:
            opt.step()
        per_step.append(sum(reads.count.values()) - before if reads is not None else 0)
    return model, opt, per_step


#: One configuration per update path (fused / reference / per-tensor / learned betas / each SGD
#: variant); the whole table under ``-m slow``.
_QUICK = {
    "sgd", "sgd_nesterov", "sgd_learn_momentum", "adam", "adam_unfused", "adam_depth3_tensor",
    "adam_learn_betas", "adamw",
}  # fmt: skip


def _quick_or_slow(configs: list[Config], quick: set[str]) -> list[Any]:
    return [pytest.param(c, id=c.name, marks=() if c.name in quick else pytest.mark.slow) for c in configs]


@pytest.mark.parametrize("config", _quick_or_slow(_TOWERS + _DEPTH0, _QUICK | {"adam_growth_search", "sgd_momentum"}))
def test_steps_after_the_window_read_nothing_from_the_device(config: Config, tensor_path: None, reads: _Reads) -> None:
    _, _, per_step = _train(config, 50, reads=reads)
    assert max(per_step[:10]) <= (0 if "depth0" in config.name else 1), f"{config.name}: start-up reads {per_step[:10]}"
    assert sum(per_step[10:]) == 0, f"{config.name}: steps 11-50 read the device {per_step[10:]} ({dict(reads.count)})"


INF_STEP, BLOWUP_STEP, NO_GRAD_STEP = 25, 32, 38


def _events(step: int, model: nn.Module) -> None:
    """A non-finite gradient (skip), a gradient 1e4 times larger (SGD's blow-up guard), a missing gradient."""
    weight, bias = model[0].weight, model[2].bias
    assert weight.grad is not None and bias.grad is not None
    if step == INF_STEP:
        weight.grad[0, 0] = float("inf")
    if step == BLOWUP_STEP:
        for p in model.parameters():
            assert p.grad is not None
            p.grad.mul_(1e4)
    if step == NO_GRAD_STEP:
        bias.grad = None


def _state_tensors(opt: Any) -> dict[str, Tensor]:
    out = {}
    for i, group in enumerate(opt.state_dict()["param_groups"]):
        for key, value in group.get("tower", {}).items():
            out[f"group{i}/{key}"] = value
    for index, st in opt.state_dict()["state"].items():
        for key, value in st.items():
            if isinstance(value, Tensor):
                out[f"state{index}/{key}"] = value
    return out


_BITWISE_CASES = [
    pytest.param(c, path, id=f"{c.name}-{path}", marks=() if c.name in _QUICK and path == "host" else pytest.mark.slow)
    for c in _TOWERS
    for path in ("host", "tensor")
]
_BITWISE_CASES += [
    pytest.param(c, "tensor", id=f"{c.name}-tensor-quick") for c in _TOWERS if c.name in {"sgd", "adamw"}
]


@pytest.mark.parametrize(("config", "path"), _BITWISE_CASES)
def test_masked_steps_equal_the_read_path_bitwise(config: Config, path: str, monkeypatch: pytest.MonkeyPatch) -> None:
    if path == "tensor":
        monkeypatch.setattr(levels, "HOST_MATH_MAX", 0)
    model, opt, _ = _train(config, 45, _events)
    monkeypatch.setattr(engine, "MASK_ON_CPU", False)  # the reference: the read path for every step
    ref_model, ref_opt, _ = _train(config, 45, _events)
    for (name, p), q in zip(model.named_parameters(), ref_model.parameters(), strict=True):
        assert torch.equal(p, q), f"{config.name}: weight {name} differs from the read path"
    got, want = _state_tensors(opt), _state_tensors(ref_opt)
    assert got.keys() == want.keys()
    for key in want:
        assert torch.equal(got[key], want[key]), f"{config.name}: {key} differs from the read path"
    assert opt.skipped_steps() == 1, "the non-finite step was not skipped"


@pytest.mark.parametrize("path", ["host", "tensor"])
def test_sgd_blowup_after_the_window_is_taken_back_without_a_read(path: str, monkeypatch: pytest.MonkeyPatch) -> None:
    """The masked blow-up retreat fires (retreats counted, step size cut by 1/(1 + r)) as the read path's does."""
    if path == "tensor":
        monkeypatch.setattr(levels, "HOST_MATH_MAX", 0)
    config = Config("sgd", lambda p: TowerSGD(p, lr=0.01), "")
    _, opt, _ = _train(config, BLOWUP_STEP)
    retreats_before = opt.retreats()
    lr_before = float(opt.param_groups[0]["effective_lr"])
    _, opt, _ = _train(config, BLOWUP_STEP + 1, _events)
    assert opt.retreats() == retreats_before + 1
    assert float(opt.param_groups[0]["effective_lr"]) < lr_before / 10


def _torch_twin(config: Config) -> Callable[[Any], torch.optim.Optimizer]:
    """torch.optim with the same settings and the kernel the masked depth-0 step takes."""
    defaults = config.factory([nn.Parameter(torch.zeros(1))]).defaults
    fused = defaults.get("fused") is not False
    if "betas" in defaults:
        cls = torch.optim.AdamW if "adamw" in config.name else torch.optim.Adam
        keys = ("lr", "betas", "eps", "weight_decay")
    else:
        cls, keys = torch.optim.SGD, ("lr", "momentum", "dampening", "weight_decay", "nesterov")
    kwargs = {k: defaults[k] for k in keys}
    return lambda p: cls(p, **kwargs, fused=fused, foreach=False if not fused else None)


@pytest.mark.parametrize("config", [pytest.param(c, id=c.name) for c in _DEPTH0])
def test_depth0_masked_equals_torch_optim_and_skips_the_nonfinite_step(config: Config) -> None:
    """Reference: torch.optim (its fused kernels where the masked step takes them, else its
    single-tensor loop), with the non-finite step not taken. Zero reads: the test above."""
    model, opt, _ = _train(config, 45, _events)
    twin = Config("torch", _torch_twin(config), "")

    def skip_inf(step: int, m: nn.Module) -> None:
        _events(step, m)
        if step == INF_STEP:
            for p in m.parameters():
                p.grad = None  # torch.optim leaves a parameter without a gradient untouched

    ref_model, _, _ = _train(twin, 45, skip_inf)
    for (name, p), q in zip(model.named_parameters(), ref_model.parameters(), strict=True):
        if "unfused" in config.name:  # the tower's reference update rounds apart from torch's loop (~1 ulp)
            torch.testing.assert_close(p, q, rtol=1e-6, atol=1e-7)
        else:  # the same fused kernel: bit for bit
            assert torch.equal(p, q), f"{config.name}: weight {name} differs from torch.optim: {(p - q).abs().max()}"
    assert opt.skipped_steps() == 1, "the non-finite step was not skipped"
    assert float(opt.param_groups[0]["effective_lr"]) == opt.param_groups[0]["lr"]


def test_an_unchanged_lr_is_made_into_a_tensor_once_and_a_changed_one_anew() -> None:
    """``plan.lr_tensor``: the step's ``lr`` on the device without a host-to-device copy per
    step while it stays the same (common practice: a CUDA graph cannot capture such a copy)."""
    from stepsize_tower.plan import lr_tensor

    model = _model()
    opt = TowerAdam(model.parameters(), lr=1e-3)
    for step in range(3):
        opt.zero_grad()
        x, y = _batch(step)
        nn.functional.mse_loss(model(x), y).backward()
        opt.step()
    group = opt.param_groups[0]
    first = lr_tensor(group, group["tower"])
    assert lr_tensor(group, group["tower"]) is first
    group["lr"] = 2e-3  # a scheduler's new value
    second = lr_tensor(group, group["tower"])
    assert second is not first
    assert float(second) == 2e-3 and float(first) == 1e-3  # the old tensor is never written


def test_the_per_tensor_unit_index_is_made_once_per_set_of_tensors_with_gradients(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """With ``granularity="tensor"`` each tensor's unit goes to the device as an index tensor:
    made once while the same tensors have gradients, anew when the set changes (common
    practice, as for the lr above)."""
    from stepsize_tower import plan

    made: list[torch.Tensor] = []
    original = plan.unit_index
    monkeypatch.setattr(plan, "unit_index", lambda unit_of, ts: made.append(original(unit_of, ts)) or made[-1])
    model = _model()
    opt = TowerAdam(model.parameters(), lr=1e-3, granularity="tensor")
    last = list(model.parameters())[-1]
    for step in range(5):
        opt.zero_grad()
        x, y = _batch(step)
        nn.functional.mse_loss(model(x), y).backward()
        if step == 4:
            last.grad = None  # one tensor without a gradient: another set of units
        opt.step()
    n = len(list(model.parameters()))
    assert all(t is made[0] for t in made[:-1]), "the index was made again for the same tensors"
    assert made[0].tolist() == list(range(n))
    assert made[-1] is not made[0] and made[-1].tolist() == list(range(n - 1))
