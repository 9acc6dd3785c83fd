"""A tiny two-layer tanh network and a fixed minibatch stream, shared by the reference tests."""

from __future__ import annotations

import torch
from torch import Tensor, nn

DTYPE = torch.float64


def init_params(n_in: int, n_hidden: int, n_out: int, seed: int = 0) -> list[Tensor]:
    """Weights of a two-layer tanh network: [W1, b1, W2, b2]."""
    gen = torch.Generator().manual_seed(seed)
    shapes = [(n_hidden, n_in), (n_hidden,), (n_out, n_hidden), (n_out,)]
    return [(0.5 * torch.randn(s, generator=gen, dtype=DTYPE)).requires_grad_() for s in shapes]


def batches(n: int, n_in: int, n_out: int, batch: int, seed: int = 1) -> list[tuple[Tensor, Tensor]]:
    """A fixed stream of minibatches, a different one per step (index = step number)."""
    gen = torch.Generator().manual_seed(seed)
    teacher = torch.randn(n_out, n_in, generator=gen, dtype=DTYPE)
    out = []
    for _ in range(n):
        x = torch.randn(batch, n_in, generator=gen, dtype=DTYPE)
        y = torch.sin(x @ teacher.T) + 0.1 * torch.randn(batch, n_out, generator=gen, dtype=DTYPE)
        out.append((x, y))
    return out


def mse_loss(ws: list[Tensor], batch: tuple[Tensor, Tensor]) -> Tensor:
    """Mean squared error of the network with weights ``ws`` on one batch."""
    w1, b1, w2, b2 = ws
    x, y = batch
    return ((torch.tanh(x @ w1.T + b1) @ w2.T + b2 - y) ** 2).mean()


def tanh_module() -> nn.Module:
    """An 8-32-1 tanh ``nn.Module`` in float64, initialized by torch's defaults under seed 0."""
    torch.manual_seed(0)
    return nn.Sequential(nn.Linear(8, 32), nn.Tanh(), nn.Linear(32, 1)).double()
