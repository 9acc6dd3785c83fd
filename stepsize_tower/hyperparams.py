"""Learned hyperparameters in (0, 1) other than the step size: SGD's momentum, Adam's betas.

The same one-step-back rule as for step sizes: for a hyperparameter θ of the base,
with ``T_{s-1} = ∂d_{0,s-1}/∂θ_{s-1}`` (a tangent the base keeps per parameter)::

    h_θ,s = ∂L_s/∂θ_{s-1} = <g_s, ∂w_{s-1}/∂θ_{s-1}> = -a_{0,s-1} <g_s, T_{s-1}>

θ is learned in logit space, ``θ = sigmoid(z)``, so it stays inside (0, 1) by
construction, with one Adam-like (or SGD-like) :class:`~stepsize_tower.levels.Level` of fixed step size::

    ĥ_z = h_θ θ (1 - θ)
    z_s = z_{s-1} - η d(ĥ_z)          (d as for levels; |z| <= LOGIT_BOUND)

The learned values live in ``group["tower"]["hyper_value"]`` (float64); the group's
own ``momentum`` / ``betas`` keep the initial values.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import torch
from torch import Tensor

from .levels import Level, moment_direction

__all__ = ["LOGIT_BOUND", "hyperparam_step", "init_hyperparam_state"]

#: Logits are clamped to ``[-LOGIT_BOUND, LOGIT_BOUND]``: values stay within about 2e-9 of (0, 1).
LOGIT_BOUND = 20.0


def init_hyperparam_state(values: Sequence[float], device: torch.device) -> dict[str, Tensor]:
    """State for learning ``values`` (each in (0, 1)); merged into the group's tower state."""
    for v in values:
        if not 0.0 < v < 1.0:
            raise ValueError(f"Invalid hyperparameter to learn: {v}; a learned momentum or beta must be in (0, 1)")
    kw: dict[str, Any] = {"dtype": torch.float64, "device": device}
    value = torch.tensor(list(values), **kw)
    return {
        "hyper_value": value,
        "hyper_logit": torch.log(value / (1 - value)),
        "hyper_exp_avg": torch.zeros_like(value),
        "hyper_exp_avg_sq": torch.zeros_like(value),
        "hyper_grad": torch.zeros_like(value),
        "hyper_count": torch.zeros((), **kw),
    }


def hyperparam_step(
    ts: dict[str, Tensor], tangent_dots: Tensor, a0_prev: Tensor, level: Level, keep: Tensor | None = None
) -> None:
    """Update the learned hyperparameters in place from ``<g_s, T_{s-1}>`` (shape [H]).

    Does nothing on the first call (no tangent exists yet); call only for taken steps, or
    with ``keep`` (a 0-dim bool tensor) masked: nothing changes where it is False.
    """
    value, z = ts["hyper_value"], ts["hyper_logit"]
    has_prev = ts["hyper_count"] > 0 if keep is None else (ts["hyper_count"] > 0) & keep
    h = -a0_prev * tangent_dots.to(value) * value * (1 - value)
    beta1, beta2 = level.betas
    m = torch.lerp(ts["hyper_exp_avg"], h, 1 - beta1)
    v = beta2 * ts["hyper_exp_avg_sq"] + (1 - beta2) * h * h
    count = ts["hyper_count"]
    if level.kind == "adam":
        direction = moment_direction(m, v, 1 - beta1**count, 1 - beta2**count, level.eps)
    else:
        direction = h
    new_z = (z - level.lr * direction).clamp(-LOGIT_BOUND, LOGIT_BOUND)
    z.copy_(torch.where(has_prev, new_z, z))
    ts["hyper_exp_avg"].copy_(torch.where(has_prev, m, ts["hyper_exp_avg"]))
    ts["hyper_exp_avg_sq"].copy_(torch.where(has_prev, v, ts["hyper_exp_avg_sq"]))
    ts["hyper_grad"].copy_(torch.where(has_prev, h, ts["hyper_grad"]))
    value.copy_(torch.sigmoid(z))
    ts["hyper_count"] += 1 if keep is None else keep.to(ts["hyper_count"].dtype)
