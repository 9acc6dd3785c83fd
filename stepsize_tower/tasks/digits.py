"""Non-convex tasks on scikit-learn's bundled 8x8 digits: an MLP and a small convolutional net."""

from __future__ import annotations

from functools import lru_cache

import torch
import torch.nn.functional as F
from torch import Tensor, nn

from .base import Batch, TaskInstance, seeded_module, split_indices, supervised_instance

__all__ = ["build_cnn_digits", "build_mlp_digits"]


@lru_cache(maxsize=1)
def _digits() -> tuple[Tensor, Tensor]:
    """The 1797 digits as float32 images in [0, 1], shape (n, 1, 8, 8), and int64 labels."""
    from sklearn.datasets import load_digits  # optional dependency: imported lazily

    data = load_digits()
    x = torch.tensor(data.images, dtype=torch.float32).unsqueeze(1) / 16.0
    return x, torch.tensor(data.target, dtype=torch.int64)


def _cross_entropy(model: nn.Module, batch: Batch) -> Tensor:
    x, y = batch
    return F.cross_entropy(model(x), y)


def _instance(name: str, seed: int, model: nn.Module, flatten: bool) -> TaskInstance:
    x_all, y_all = _digits()
    if flatten:
        x_all = x_all.flatten(1)
    train, test = split_indices(x_all.shape[0], 0.8, seed)
    return supervised_instance(
        name, model, _cross_entropy, (x_all[train], y_all[train]), (x_all[test], y_all[test]), batch_size=64, seed=seed
    )


def build_mlp_digits(seed: int) -> TaskInstance:
    """A 64-128-64-10 ReLU MLP on flattened digits; batch 64, 300 steps, cross-entropy."""
    model = seeded_module(
        seed,
        lambda: nn.Sequential(nn.Linear(64, 128), nn.ReLU(), nn.Linear(128, 64), nn.ReLU(), nn.Linear(64, 10)),
    )
    return _instance("mlp_digits", seed, model, flatten=True)


def build_cnn_digits(seed: int) -> TaskInstance:
    """Two 3x3 convolutions (16, 32 channels), a 2x2 max-pool and a linear head; batch 64, 300 steps."""
    model = seeded_module(
        seed,
        lambda: nn.Sequential(
            nn.Conv2d(1, 16, 3, padding=1),
            nn.ReLU(),
            nn.Conv2d(16, 32, 3, padding=1),
            nn.ReLU(),
            nn.MaxPool2d(2),
            nn.Flatten(),
            nn.Linear(32 * 4 * 4, 10),
        ),
    )
    return _instance("cnn_digits", seed, model, flatten=False)
