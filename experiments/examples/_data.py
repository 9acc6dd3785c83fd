"""A small synthetic regression problem shared by the examples (generated, nothing downloaded)."""

from __future__ import annotations

import torch
from torch import nn


def model(seed: int = 0) -> nn.Module:
    """A small MLP, seeded."""
    torch.manual_seed(seed)
    return nn.Sequential(nn.Linear(8, 32), nn.Tanh(), nn.Linear(32, 1))


def batch(step: int, seed: int = 0, size: int = 64) -> tuple[torch.Tensor, torch.Tensor]:
    """Minibatch ``step`` of the stream for ``seed``: y = sin(x . w) plus noise."""
    gen = torch.Generator().manual_seed(seed * 100_003 + step)
    x = torch.randn(size, 8, generator=gen)
    return x, torch.sin(x @ torch.linspace(-1, 1, 8)).unsqueeze(1) + 0.05 * torch.randn(size, 1, generator=gen)


def loss(net: nn.Module, step: int, seed: int = 0) -> torch.Tensor:
    """Mean squared error on minibatch ``step``."""
    x, y = batch(step, seed)
    return nn.functional.mse_loss(net(x), y)
