r"""The start-up test when the user clips gradients: a reversal test that reads no magnitudes.

The start-up test (:mod:`stepsize_tower.safeguards`) compares the slopes at both ends of the
last step, ``rho = <g_s, d> / <g_{s-1}, d>``, and retreats when ``rho < -1`` (the loss rose
along ``d``, on a quadratic). Clipping hides that: after ``clip_grad_norm_`` consecutive
gradients have the same norm, so for plain SGD (``d = g_{s-1}``) ``rho`` is a cosine and can
never fall below −1, however far the step overshot; after ``clip_grad_value_`` the largest
entries are pinned. A step size 1 000x too large then bounces across the valley unseen.

So the typed step size gets one more check, on its first step. Clipping is *detected* from
the gradients alone:

* norm clipping: ``| ||g_1|| / ||g_0|| - 1 | < NORM_TOLERANCE`` (``clip_grad_norm_`` leaves
  ``max_norm * T / (T + 1e-6)``, equal to about 1e-6 relative whatever ``max_norm`` is);
* value clipping: the largest absolute entry is the same on both steps (``clamp`` leaves
  exactly ``clip_value``).

When either holds, the magnitudes carry no information and the test reads the *direction*
only, the slope ratio with the gradient norms divided out:

.. math::

    \rho_n = \frac{\langle g_1, d\rangle / \|g_1\|}{\langle g_0, d\rangle / \|g_0\|},
    \qquad \text{retreat when } \rho_n < -\text{REVERSAL},
    \qquad a_{0} \leftarrow \frac{a_{0}}{1 - \rho_n}

(the secant step, about a halving since ``rho_n >= -1``). The retried first step is tested
the same way, so a step size decades too large is halved until its first step no longer
reverses: ten halvings for 1 000x. Only the first step: later, clipped gradients of a real
network reverse without any overshoot (a word-level LSTM language model clipped at 0.25, at
SGD rates 3 and 10, below its best fixed rate 30: normalized ratios below -0.8 on steps 2-9
in 4 of 9 runs, never on step 1; see experiments/README.md). The test runs per parameter group: a clip over
several groups at once is seen where a group's own norm or largest entry stays put (e.g.
``clip_grad_value_``, or one group).
"""

from __future__ import annotations

from dataclasses import dataclass

import torch
from torch import Tensor

__all__ = ["NORM_TOLERANCE", "REVERSAL", "ClipSignal", "detected", "remember", "reversal"]

#: Relative change of the gradient norm below which two steps count as norm-clipped.
NORM_TOLERANCE = 1e-3

#: Under clipping, the normalized slope ratio below ``-REVERSAL`` counts as an overshoot.
REVERSAL = 0.8


@dataclass(frozen=True)
class ClipSignal:
    """This step's gradient, in the two numbers clipping fixes: its squared norm and largest entry."""

    norm_sq: Tensor
    gmax: Tensor


def _previous(ts: dict[str, Tensor], key: str) -> Tensor:
    """The last taken step's value (0 before the first one, or from a checkpoint that predates it)."""
    return ts.setdefault(key, torch.zeros_like(ts["step"]))


def detected(ts: dict[str, Tensor], now: ClipSignal) -> Tensor:
    """Whether this step and the last taken one look clipped (by norm or by value)."""
    prev_sq, prev_max = _previous(ts, "prev_gnorm_sq"), _previous(ts, "prev_gmax")
    by_norm = (prev_sq > 0) & ((now.norm_sq / prev_sq).sqrt() - 1.0).abs().lt(NORM_TOLERANCE)
    by_value = (prev_max > 0) & (now.gmax == prev_max)
    return by_norm | by_value


def reversal(ts: dict[str, Tensor], rho: Tensor, prev_slope: Tensor, now: ClipSignal) -> tuple[Tensor, Tensor]:
    """``(fires, factor)``: the clipped step reversed along ``d`` (``rho_n < -REVERSAL``), and its secant factor."""
    rho_n = rho * (_previous(ts, "prev_gnorm_sq") / now.norm_sq).sqrt()
    fires = detected(ts, now) & (prev_slope > 0) & (rho_n < -REVERSAL)
    return fires, 1.0 / (1.0 - rho_n)


def remember(ts: dict[str, Tensor], now: ClipSignal) -> None:
    """Keep a taken step's signal for the next test."""
    _previous(ts, "prev_gnorm_sq").copy_(now.norm_sq)
    _previous(ts, "prev_gmax").copy_(now.gmax)
