"""An example user task for ``recipes/user_model.yaml``: your own model and data.

The runner calls ``build_rings(seed, **task.options)`` with torch's RNG already seeded from
``seed`` and expects a mapping with ``model``, ``train`` and ``test`` (see
``stepsize_tower/runner/user_task.py`` for every accepted key).
"""

from __future__ import annotations

import math
from typing import Any

import torch
from torch import Tensor, nn


class ResidualMLP(nn.Module):
    """Two residual blocks on a 2-d input, three classes."""

    def __init__(self, width: int = 64) -> None:
        super().__init__()
        self.inp = nn.Linear(2, width)
        self.blocks = nn.ModuleList(nn.Sequential(nn.ReLU(), nn.Linear(width, width)) for _ in range(2))
        self.out = nn.Linear(width, 3)

    def forward(self, x: Tensor) -> Tensor:
        h = self.inp(x)
        for block in self.blocks:
            h = h + block(h)
        return self.out(torch.relu(h))


def _rings(rows: int, noise: float, gen: torch.Generator) -> tuple[Tensor, Tensor]:
    """Three concentric noisy rings (radius 1, 2, 3), one class each."""
    y = torch.randint(0, 3, (rows,), generator=gen)
    angle = 2 * math.pi * torch.rand(rows, generator=gen)
    radius = (y + 1).float() + noise * torch.randn(rows, generator=gen)
    return torch.stack([radius * angle.cos(), radius * angle.sin()], dim=1) / 3.0, y


def build_rings(seed: int, rows: int = 3000, noise: float = 0.15) -> dict[str, Any]:
    """Generated rings (fixed data, split by ``seed``) and a fresh residual MLP."""
    x, y = _rings(rows, noise, torch.Generator().manual_seed(1234))
    perm = torch.randperm(rows, generator=torch.Generator().manual_seed(seed))
    cut = int(0.8 * rows)
    train, test = perm[:cut], perm[cut:]

    def test_accuracy(model: nn.Module) -> float:
        with torch.no_grad():
            return float((model(x[test]).argmax(-1) == y[test]).float().mean())

    return {
        "model": ResidualMLP(),
        "train": (x[train], y[train]),
        "test": (x[test], y[test]),
        "loss": "cross_entropy",
        "metrics": {"test_accuracy": test_accuracy},
    }
