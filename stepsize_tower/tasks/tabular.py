"""Convex tabular tasks: logistic regression (well scaled) and least squares (badly scaled)."""

from __future__ import annotations

from functools import lru_cache

import torch
import torch.nn.functional as F
from torch import Tensor, nn

from .base import Batch, TaskInstance, seeded_module, split_indices, supervised_instance

__all__ = ["build_least_squares_raw", "build_logistic_cancer"]

#: L2 penalty of the logistic regression (makes the optimum unique; the data is nearly separable).
LOGISTIC_L2 = 1e-3

#: Scales of the raw least-squares features, smallest to largest.
RAW_SCALES = (1e-2, 1e3)
RAW_FEATURES = 12
RAW_ROWS = 2048
RAW_NOISE = 0.1
_RAW_DATA_SEED = 20240611


@lru_cache(maxsize=1)
def _cancer_data() -> tuple[Tensor, Tensor]:
    """scikit-learn's bundled breast-cancer set (569 x 30), as float32 tensors, not yet standardized."""
    from sklearn.datasets import load_breast_cancer  # optional dependency: imported lazily

    data = load_breast_cancer()
    return torch.tensor(data.data, dtype=torch.float32), torch.tensor(data.target, dtype=torch.float32)


def build_logistic_cancer(seed: int) -> TaskInstance:
    """Logistic regression on the breast-cancer set, standardized with training statistics.

    80 % train / 20 % held out (split by ``seed``), batch 32, 300 steps. The objective is
    the mean binary cross-entropy plus ``LOGISTIC_L2 / 2 · ||w||²`` (bias excluded).
    """
    x_all, y_all = _cancer_data()
    train, test = split_indices(x_all.shape[0], 0.8, seed)
    mean, std = x_all[train].mean(0), x_all[train].std(0).clamp_min(1e-8)
    x_all = (x_all - mean) / std

    def loss_fn(model: nn.Module, batch: Batch) -> Tensor:
        x, y = batch
        penalty = sum(p.pow(2).sum() for name, p in model.named_parameters() if name.endswith("weight"))
        return F.binary_cross_entropy_with_logits(model(x).squeeze(-1), y) + 0.5 * LOGISTIC_L2 * penalty

    model = seeded_module(seed, lambda: nn.Sequential(nn.Linear(x_all.shape[1], 1)))
    return supervised_instance(
        "logreg_cancer",
        model,
        loss_fn,
        (x_all[train], y_all[train]),
        (x_all[test], y_all[test]),
        batch_size=32,
        seed=seed,
    )


@lru_cache(maxsize=1)
def _raw_data() -> tuple[Tensor, Tensor]:
    """Generated measurements whose columns span ``RAW_SCALES``, with a linear target.

    Column j is ``scale_j · (offset_j + z_j)`` with ``z ~ N(0, 1)`` and a fixed positive
    offset (raw measurements are rarely centred), and the target is
    ``Σ c_j z_j + RAW_NOISE · ε`` with unit-variance signal. So the best linear fit
    reaches a loss of about ``RAW_NOISE²``, but only after every column, from the
    tiniest to the largest, has been fitted. The data is the same for every seed.
    """
    gen = torch.Generator().manual_seed(_RAW_DATA_SEED)
    lo, hi = (torch.tensor(s).log10() for s in RAW_SCALES)
    scales = torch.logspace(float(lo), float(hi), RAW_FEATURES)
    offsets = torch.rand(RAW_FEATURES, generator=gen)
    z = torch.randn(RAW_ROWS, RAW_FEATURES, generator=gen)
    coef = torch.randn(RAW_FEATURES, generator=gen)
    coef = coef / coef.norm()
    y = z @ coef + RAW_NOISE * torch.randn(RAW_ROWS, generator=gen)
    return scales * (offsets + z), y


def build_least_squares_raw(seed: int) -> TaskInstance:
    """Linear least squares on generated raw features with scales from 1e-2 to 1e3.

    Convex but ill-conditioned (curvature spans about ten orders of magnitude): no single
    fixed step size suits every direction. 80 % / 20 % split by ``seed``, batch 64,
    300 steps, mean squared error.
    """
    x_all, y_all = _raw_data()
    train, test = split_indices(x_all.shape[0], 0.8, seed)

    def loss_fn(model: nn.Module, batch: Batch) -> Tensor:
        x, y = batch
        return F.mse_loss(model(x).squeeze(-1), y)

    model = seeded_module(seed, lambda: nn.Sequential(nn.Linear(RAW_FEATURES, 1)))
    return supervised_instance(
        "lsq_raw",
        model,
        loss_fn,
        (x_all[train], y_all[train]),
        (x_all[test], y_all[test]),
        batch_size=64,
        seed=seed,
    )
