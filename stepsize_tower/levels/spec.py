"""One level of a tower (:class:`Level`), the bounds every level keeps, and the layout of a tower's state."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import torch
from torch import Tensor

__all__ = [
    "HOST_MATH_MAX",
    "HYPERGRAD_BOUND",
    "LEVEL_KINDS",
    "LOG_STEP_BOUND",
    "MAX_LOG_CHANGE",
    "Level",
    "current_step_sizes",
    "init_tower_state",
]

LEVEL_KINDS = ("sgd", "adam")

#: Hypergradients are clamped to ``±HYPERGRAD_BOUND`` so that their squares (the moments of
#: kind "adam") stay finite in float64 even when "sgd" levels feed on each other.
HYPERGRAD_BOUND = 1e100

#: No level changes its log step size by more than this in one step (a factor of e).
MAX_LOG_CHANGE = 1.0

#: Log step sizes are clamped to ``[-LOG_STEP_BOUND, LOG_STEP_BOUND]`` (about 1e-30 ... 1e30
#: relative for level 0), which keeps every step size finite by construction.
LOG_STEP_BOUND = 69.0

STATE_DTYPE = torch.float64

#: Up to this many learned step sizes (units x levels) on the CPU, the level arithmetic runs
#: in Python floats (:mod:`.host_path`); above it, as tensor operations (:mod:`.tensor_path`).
#: Measured: 30 vs 135 us per step for one step size; the two cost the same at about 15 step
#: sizes, and the threshold stays below that crossover.
HOST_MATH_MAX = 8


@dataclass(frozen=True)
class Level:
    r"""One upper level of a tower.

    Args:
        kind: ``"adam"`` (normalized moments of the log-space hypergradient; moves
            ``log a`` by about ``lr`` per step whatever the scale of the loss) or
            ``"sgd"`` (plain descent on ``log a``; scale-dependent).
        lr: this level's own step size ``a_k``. Fixed if this is the top level,
            otherwise its initial value, learned by the level above.
        betas: moment coefficients for ``kind="adam"`` (default: (0.9, 0.999)).
        eps: added to ``sqrt(v̂)`` for ``kind="adam"`` (default: 1e-30: hypergradients
            are tiny when the step size is tiny, so a larger ``eps`` would freeze the level).
        shrink: the share of each move that LOWERS the step size below this level which is
            made; moves that raise it are made in full. With the move
            :math:`c = a_k d_k` on :math:`u_{k-1} = \log a_{k-1}`,

            .. math:: u_{k-1} \leftarrow u_{k-1} - \begin{cases} \text{shrink}\cdot c & c > 0 \\ c & c \le 0 \end{cases}

            1 (the default) is the plain symmetric rule. Under gradient noise the greedy
            hypergradient asks to shrink even at the best constant rate (short-horizon bias);
            a value below 1 discounts that evidence. Measured, opt-in: experiments/README.md,
            "Discounting the evidence for shrinking".
        consistency: for ``kind="adam"``, how much a move that LOWERS the step size below
            this level is weighed by how consistent its evidence is. The direction
            :math:`d_k = \hat m / (\sqrt{\hat v} + \epsilon)` is near 1 when the
            hypergradient keeps one sign and small when it is noise around a weak drift; the
            level moves :math:`u_{k-1}` by

            .. math:: -a_k \, d_k \, w_k, \qquad
                w_k = \min(d_k, 1)^{\text{consistency}} \text{ if } d_k > 0 \text{ (lowering), else } 1

            0 is the plain rule. Under gradient noise the greedy hypergradient drifts towards
            smaller steps (short-horizon bias); this discounts a weak drift (0.5 slows a drift
            of ``d = 0.25`` twofold) and leaves raising moves as they are. Measured:
            experiments/README.md, "Weighing moves by their consistency".
    """

    kind: str = "adam"
    lr: float = 0.02
    betas: tuple[float, float] = (0.9, 0.999)
    eps: float = 1e-30
    shrink: float = 1.0
    consistency: float = 0.0

    def __post_init__(self) -> None:
        if self.kind not in LEVEL_KINDS:
            raise ValueError(f"Invalid level kind: {self.kind!r}; expected one of {', '.join(map(repr, LEVEL_KINDS))}")
        if not (isinstance(self.lr, (int, float)) and math.isfinite(self.lr) and self.lr > 0):
            raise ValueError(f"Invalid level lr: {self.lr!r}; expected a finite number > 0")
        if len(self.betas) != 2 or not all(0.0 <= b < 1.0 for b in self.betas):
            raise ValueError(f"Invalid level betas: {self.betas!r}; expected two numbers in [0, 1)")
        if not (math.isfinite(self.eps) and self.eps >= 0):
            raise ValueError(f"Invalid level eps: {self.eps!r}; expected a finite number >= 0")
        if not (isinstance(self.shrink, (int, float)) and 0.0 < self.shrink <= 1.0):
            raise ValueError(
                f"Invalid level shrink: {self.shrink!r}; expected 0 < shrink <= 1 (1 = shrink as fast as grow)"
            )
        c = self.consistency
        if not (isinstance(c, (int, float)) and not isinstance(c, bool) and math.isfinite(c) and 0.0 <= c <= 4.0):
            raise ValueError(f"Invalid level consistency: {c!r}; expected a number in [0, 4] (0 = the plain rule)")
        if c and self.kind != "adam":
            raise ValueError(
                f"Invalid level consistency: {c!r} needs kind='adam' (an 'sgd' level's direction is not"
                " normalized, so its size says nothing about consistency); use consistency=0"
            )


def init_tower_state(levels: Sequence[Level], units: int, device: torch.device) -> dict[str, Tensor]:
    """Fresh state for a tower of ``len(levels)`` levels over ``units`` independent step sizes.

    Keys (``D = len(levels)``, ``U = units``):
      ``log_step`` [U, D]: ``u_0`` (log factor on ``group["lr"]``) then ``u_1 .. u_{D-1}``.
      ``prev_step`` [U, D]: ``a_{k,s-1}``, the step sizes used in the last step.
      ``prev_dir`` [U, D]: ``d_{k,s-1}`` for levels ``1..D``.
      ``exp_avg``, ``exp_avg_sq`` [U, D]: moments of ``ĥ`` (kind "adam").
      ``hypergrad`` [U, D]: the last ``ĥ_1 .. ĥ_D`` (for inspection and tests).
      ``prev_slope`` [U]: ``<g_{s-1}, d_{0,s-1}>``, the last step's directional slope.
      ``peak_gmax`` []: the largest absolute gradient entry of all taken steps (SGD's guard).
      ``search`` [U]: steps of the growth search so far, or -1 once it has ended.
      ``step``, ``skipped``, ``retreats`` []: counters; ``retreated`` []: 0, or after a retreat the
      slope change its retried step is expected to show (-1 after a retreat not of the secant test).
    """
    d = len(levels)
    kw: dict[str, Any] = {"dtype": STATE_DTYPE, "device": device}
    log_step = torch.zeros(units, d, **kw)
    for k in range(1, d):
        log_step[:, k] = math.log(levels[k - 1].lr)
    return {
        "log_step": log_step,
        "prev_step": torch.zeros(units, d, **kw),
        "prev_dir": torch.zeros(units, d, **kw),
        "exp_avg": torch.zeros(units, d, **kw),
        "exp_avg_sq": torch.zeros(units, d, **kw),
        "hypergrad": torch.zeros(units, d, **kw),
        "prev_slope": torch.zeros(units, **kw),
        "peak_gmax": torch.zeros((), **kw),
        "search": torch.zeros(units, **kw),
        "step": torch.zeros((), **kw),
        "skipped": torch.zeros((), **kw),
        "retreats": torch.zeros((), **kw),
        "retreated": torch.zeros((), **kw),
    }


def current_step_sizes(ts: dict[str, Tensor], levels: Sequence[Level], lr: float | Tensor) -> Tensor:
    """All step sizes ``[a_0, a_1, ..., a_D]`` per unit, shape [U, D+1], from the state."""
    u = ts["log_step"]
    units, d = u.shape
    out = torch.empty(units, d + 1, dtype=u.dtype, device=u.device)
    out[:, :d] = u.exp()
    out[:, d] = levels[-1].lr if d else 1.0
    out[:, 0] *= lr
    return out
