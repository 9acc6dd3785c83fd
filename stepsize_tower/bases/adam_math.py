"""Adam's arithmetic, written once: the direction, the bias corrections, the moment update.

In torch.optim.Adam's order of operations, so that ``depth=0`` reproduces it bit for bit.
"""

from __future__ import annotations

from typing import Any

from torch import Tensor

__all__ = ["Beta", "adam_denominator", "adam_direction", "betas_in_use", "bias_corrections", "update_moments"]

Beta = float | Tensor


def adam_denominator(v: Tensor, bc2_sqrt: Tensor, eps: float) -> Tensor:
    """``sqrt(v̂) + eps`` with ``sqrt(v̂) = sqrt(v) / sqrt(1 - β2^t)`` (torch.optim's order of operations)."""
    return (v.sqrt() / bc2_sqrt).add_(eps)


def adam_direction(m: Tensor, v: Tensor, bc2_sqrt: Tensor, eps: float) -> Tensor:
    """Adam's direction before the first moment's bias correction: ``m / (sqrt(v̂) + eps)``.

    ``d_0 = adam_direction(...) / (1 - β1^t)``; callers divide where torch.optim does.
    """
    return m / adam_denominator(v, bc2_sqrt, eps)


def betas_in_use(group: dict[str, Any], learned: Tensor | None) -> tuple[Beta, Beta]:
    """The betas in use: the learned ones (float64 tensors) with ``learn_betas``, else the group's."""
    if learned is not None and group.get("learn_betas"):
        return learned[0], learned[1]
    beta1, beta2 = group["betas"]
    return beta1, beta2


def bias_corrections(betas: tuple[Beta, Beta], step: Tensor) -> tuple[Tensor, Tensor]:
    """``(1 - β1^t, sqrt(1 - β2^t))`` as float64 tensors, for a step count tensor ``t``."""
    t = step.double()
    return 1 - betas[0] ** t, (1 - betas[1] ** t).sqrt()


def update_moments(m: Tensor, v: Tensor, g: Tensor, beta1: Beta, beta2: Beta) -> None:
    """In place: ``m <- β1 m + (1-β1) g``, ``v <- β2 v + (1-β2) g²`` (torch.optim's order of operations)."""
    if isinstance(beta1, Tensor) or isinstance(beta2, Tensor):
        m.lerp_(g, (1 - beta1).to(m.dtype) if isinstance(beta1, Tensor) else 1 - beta1)
        v.mul_(beta2 if not isinstance(beta2, Tensor) else beta2.to(v.dtype)).addcmul_(
            g, g * (1 - beta2 if not isinstance(beta2, Tensor) else (1 - beta2).to(v.dtype))
        )
    else:
        m.lerp_(g, 1 - beta1)
        v.mul_(beta2).addcmul_(g, g, value=1 - beta2)
