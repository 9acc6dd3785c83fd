"""Small deterministic problems shared by the safeguard, growth-search and horizon tests."""

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


def tanh_regression(batches: int = 16) -> Callable[[torch.Tensor, int], torch.Tensor]:
    """``loss(w, s)``: minibatch ``s`` of a tanh regression on 8 float64 weights (a different
    batch of 12 rows at each step ``s < batches``)."""
    gen = torch.Generator().manual_seed(5)
    target = torch.randn(8, dtype=torch.float64, generator=gen)
    xs = [torch.randn(12, 8, dtype=torch.float64, generator=gen) for _ in range(batches)]

    def loss(w: torch.Tensor, s: int) -> torch.Tensor:
        return ((torch.tanh(xs[s] @ w) - torch.tanh(xs[s] @ target)) ** 2).mean()

    return loss


def recorded_run(
    opt: torch.optim.Optimizer, w: torch.Tensor, loss: Callable[[torch.Tensor, int], torch.Tensor], steps: int
) -> tuple[list[torch.Tensor], torch.Tensor]:
    """Take ``steps`` steps of ``opt`` on ``loss(w, s)``; the weights before every step and after
    the last, and the last step's gradient."""
    history = [w.detach().clone()]
    g_last = torch.zeros_like(w)
    for s in range(steps):
        opt.zero_grad()
        loss(w, s).backward()
        assert w.grad is not None
        g_last = w.grad.clone()
        opt.step()
        history.append(w.detach().clone())
    return history, g_last
