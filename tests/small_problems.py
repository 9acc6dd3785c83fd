"""Two small deterministic problems shared by the safeguard and growth-search tests."""

from __future__ import annotations

from collections.abc import Callable

import torch

#: Eigenvalues of :func:`quadratic`'s Hessian: largest curvature L = 1.
CURVATURES = torch.linspace(0.1, 1.0, 10, dtype=torch.float64)


def quadratic() -> Callable[[torch.Tensor], torch.Tensor]:
    """0.5 (w - w*)^T H (w - w*) with eigenvalues ``CURVATURES``, in a random basis."""
    gen = torch.Generator().manual_seed(0)
    q, _ = torch.linalg.qr(torch.randn(10, 10, dtype=torch.float64, generator=gen))
    h = q @ torch.diag(CURVATURES) @ q.T
    target = torch.randn(10, dtype=torch.float64, generator=gen)

    def loss(w: torch.Tensor) -> torch.Tensor:
        e = w - target
        return 0.5 * e @ h @ e

    return loss


def network_task(seed: int = 0) -> tuple[torch.nn.Module, Callable[[], torch.Tensor]]:
    """A small tanh network fitting a smooth synthetic target (full batch, deterministic)."""
    gen = torch.Generator().manual_seed(seed)
    x = torch.randn(256, 8, generator=gen)
    y = torch.sin(x @ torch.randn(8, 1, generator=gen))
    torch.manual_seed(seed)
    model = torch.nn.Sequential(torch.nn.Linear(8, 32), torch.nn.Tanh(), torch.nn.Linear(32, 1))

    def loss() -> torch.Tensor:
        return torch.nn.functional.mse_loss(model(x), y)

    return model, loss
