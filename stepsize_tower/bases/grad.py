"""The gradient of the minimized loss, for every base."""

from __future__ import annotations

from torch import Tensor

__all__ = ["loss_grad"]


def loss_grad(grad: Tensor, p: Tensor, *, maximize: bool, l2: float) -> Tensor:
    """``±grad + l2 w``: the sign flipped under ``maximize``, L2 weight decay as part of the loss.

    As in ``torch.optim.SGD`` / ``torch.optim.Adam`` (``grad.add(p, alpha=weight_decay)``).
    """
    g = -grad if maximize else grad
    if l2 != 0:
        g = g.add(p, alpha=l2)
    return g
