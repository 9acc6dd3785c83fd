"""The start-up test fires when the user clips gradients (``clip_grad_norm_``, ``clip_grad_value_``).

Reference: the quadratic ``L(w) = ½ Σ h_i (w_i - w*_i)²`` has its minimum 0 at ``w*`` (closed
form); gradient descent on it is stable for ``lr < 2 / max h`` (common practice), here 0.2, so
a typed lr of 100 or 1 000 is 500-5 000x too large. Before the clipping-aware test, TowerSGD
typed 1 000 with ``clip_grad_norm_(…, 1.0)`` never retreated and ended above its starting loss
(184 from 104).
"""

from __future__ import annotations

from collections.abc import Callable

import pytest
import torch

from stepsize_tower import TowerAdam, TowerSGD
from stepsize_tower.clipping import NORM_TOLERANCE

N = 50
CURVATURES = torch.logspace(0, 1, N, dtype=torch.float64)  # 1 … 10
W_STAR = torch.randn(N, generator=torch.Generator().manual_seed(0), dtype=torch.float64)
L0 = float(0.5 * (CURVATURES * W_STAR**2).sum())

Clip = Callable[[torch.Tensor], None]
CLIPS: dict[str, Clip] = {
    "norm_1": lambda w: torch.nn.utils.clip_grad_norm_([w], 1.0),
    "norm_0.1": lambda w: torch.nn.utils.clip_grad_norm_([w], 0.1),
    "value_0.1": lambda w: torch.nn.utils.clip_grad_value_([w], 0.1),
}


def _run(opt_cls: type, lr: float, clip: Clip | None, steps: int = 300) -> tuple[float, int]:
    w = torch.zeros(N, dtype=torch.float64, requires_grad=True)
    opt = opt_cls([w], lr=lr)
    for _ in range(steps):
        opt.zero_grad()
        (0.5 * (CURVATURES * (w - W_STAR) ** 2).sum()).backward()
        if clip is not None:
            clip(w)
        opt.step()
    loss = float(0.5 * (CURVATURES * (w.detach() - W_STAR) ** 2).sum())
    return loss, opt.retreats()


@pytest.mark.parametrize("clip", list(CLIPS), ids=list(CLIPS))
@pytest.mark.parametrize(
    "opt_cls, lr", [(TowerSGD, 1e3), (TowerSGD, 1e2), (TowerAdam, 1e2)], ids=["sgd-1e3", "sgd-1e2", "adam-1e2"]
)
def test_far_too_large_step_size_under_clipping_retreats_and_ends_near_the_optimum(
    opt_cls: type, lr: float, clip: str
) -> None:
    loss, retreats = _run(opt_cls, lr, CLIPS[clip])
    assert retreats >= 1
    # Before the clipping-aware test: 4e-4 … 1.8 of L0 (SGD typed 1e3 under norm 1: 1.8, no retreat).
    assert loss < 0.01 * L0, (loss, retreats)


@pytest.mark.parametrize("clip", list(CLIPS), ids=list(CLIPS))
@pytest.mark.parametrize("opt_cls, lr", [(TowerSGD, 0.1), (TowerAdam, 0.01)], ids=["sgd", "adam"])
def test_a_good_step_size_under_clipping_is_not_cut(opt_cls: type, lr: float, clip: str) -> None:
    """A stable typed lr under clipping descends without a reversal: nothing is taken back."""
    _, retreats = _run(opt_cls, lr, CLIPS[clip], steps=30)
    assert retreats == 0


def test_without_clipping_the_reversal_test_stays_silent() -> None:
    """Unclipped gradients keep the magnitude test: a cosine of -1 with a shrinking gradient is no overshoot.

    On ``h = 1`` with ``lr = 1.5`` every step flips the sign of ``w`` (cosine -1) while ``|w|``
    halves (``|1 - 1.5| = 0.5``): the loss falls, so nothing may retreat.
    """
    w = torch.tensor([1.0], dtype=torch.float64, requires_grad=True)
    opt = TowerSGD([w], lr=1.5)
    for _ in range(10):
        opt.zero_grad()
        (0.5 * w**2).sum().backward()
        opt.step()
    assert opt.retreats() == 0


def test_clipping_is_detected_only_when_norms_agree_within_the_tolerance() -> None:
    """Gradient norms that differ by more than the tolerance are not taken for clipping."""
    from stepsize_tower.clipping import ClipSignal, detected

    ts = {"step": torch.zeros((), dtype=torch.float64)}
    prev = ClipSignal(torch.tensor(4.0, dtype=torch.float64), torch.tensor(0.3, dtype=torch.float64))
    detected(ts, prev)
    ts["prev_gnorm_sq"].copy_(prev.norm_sq)
    ts["prev_gmax"].copy_(prev.gmax)
    inside = (2.0 * (1 + NORM_TOLERANCE / 2)) ** 2
    outside = (2.0 * (1 + 2 * NORM_TOLERANCE)) ** 2
    other_max = torch.tensor(0.5, dtype=torch.float64)
    assert bool(detected(ts, ClipSignal(torch.tensor(inside, dtype=torch.float64), other_max)))
    assert not bool(detected(ts, ClipSignal(torch.tensor(outside, dtype=torch.float64), other_max)))
    assert bool(detected(ts, ClipSignal(torch.tensor(outside, dtype=torch.float64), prev.gmax.clone())))
