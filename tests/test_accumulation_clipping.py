"""Gradient accumulation and clipping: the hypergradient uses the gradient actually applied (`.grad` at step())."""

from __future__ import annotations

import pytest
import torch
from torch import nn

import stepsize_tower

MICRO = 3


def _model() -> nn.Module:
    torch.manual_seed(0)
    return nn.Sequential(nn.Linear(5, 12), nn.Tanh(), nn.Linear(12, 1)).double()


def _micro_loss(model: nn.Module, step: int, micro: int) -> torch.Tensor:
    gen = torch.Generator().manual_seed(1000 * step + micro)
    x = torch.randn(8, 5, generator=gen, dtype=torch.float64)
    return ((model(x).squeeze(-1) - x[:, 0] * x[:, 1]) ** 2).mean()


def _flat(tensors: list[torch.Tensor]) -> torch.Tensor:
    return torch.cat([t.reshape(-1) for t in tensors])


@pytest.mark.parametrize(
    "opt_cls",
    [
        lambda ps: stepsize_tower.TowerSGD(ps, lr=0.2, horizon=0.0, retreat=False),
        lambda ps: stepsize_tower.TowerAdam(ps, lr=0.05, horizon=0.0, retreat=False),
    ],
    ids=["sgd", "adam"],
)
def test_hypergradient_uses_the_accumulated_clipped_gradient(opt_cls: object) -> None:
    """reference: ĥ_1 = -<g_s, Δ_{s-1}> by hand, g_s = the ``.grad`` at ``step()``, Δ = the last weight move."""
    model = _model()
    opt = opt_cls(model.parameters())  # type: ignore[operator]
    prev_move = None
    clipped_any = False
    for step in range(8):
        opt.zero_grad()
        for micro in range(MICRO):  # common practice: scale each micro-batch loss by 1/MICRO
            (_micro_loss(model, step, micro) / MICRO).backward()
        raw = _flat([p.grad for p in model.parameters()]).clone()
        norm = torch.nn.utils.clip_grad_norm_(model.parameters(), max_norm=0.05)
        clipped_any |= bool(norm > 0.05)
        applied = _flat([p.grad for p in model.parameters()]).clone()
        before = _flat([p.detach() for p in model.parameters()]).clone()
        opt.step()
        after = _flat([p.detach() for p in model.parameters()])
        if prev_move is not None:
            expected = -torch.dot(applied, prev_move)
            got = opt.param_groups[0]["tower"]["hypergrad"][0, 0]
            torch.testing.assert_close(got, expected, rtol=1e-12, atol=1e-18)
            if not torch.allclose(raw, applied):
                # the raw (unclipped) gradient would give another value: it is not the one used
                assert not torch.isclose(got, -torch.dot(raw, prev_move), rtol=1e-6)
        prev_move = before - after  # Δ = a_0 d_0
    assert clipped_any
