"""TowerSGD: SGD (momentum, dampening, Nesterov, weight decay) with a learned step size."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from torch import Tensor

from .bases.sgd import SGDRule
from .horizon import Horizon
from .levels import Level
from .options import (
    DEFAULT_HYPER_LEVEL,
    DEFAULT_SCHEDULE_HOLD_BACK,
    SGD_OPTIONS,
    TOWER_OPTIONS,
    default_horizon,
    resolve_levels,
)
from .tower import TowerOptimizer

__all__ = ["TowerSGD"]


class TowerSGD(TowerOptimizer):
    r"""SGD whose step size is learned online by a tower of hypergradient levels.

    .. math::
        \begin{aligned}
        &g_s = \nabla L_s(w_{s-1}) + \lambda w_{s-1}, \qquad
         b_s = \mu b_{s-1} + (1-\tau) g_s, \qquad
         d_{0,s} = g_s \;|\; b_s \;|\; g_s + \mu b_s \\
        &\hat h_{1,s} = -\Big\langle g_s,\; \sum_{j<s} \gamma^{s-1-j} a_{0,j} d_{0,j} \Big\rangle
         \qquad \text{(hypergradient of } \log a_0 \text{; } \gamma = 0 \text{: one step back)} \\
        &\text{levels } D \dots 1:\; \log a_{k-1,s} = \log a_{k-1,s-1}
         - \mathrm{clip}(a_{k,s}\, d_{k,s}, \pm 1)
         \qquad\text{(see } \texttt{stepsize\_tower.levels} \text{)} \\
        &w_s = w_{s-1} - a_{0,s}\, d_{0,s}, \qquad a_{0,s} = \mathrm{lr} \cdot e^{u_{0,s}}
        \end{aligned}

    With ``horizon=(γ_0, γ_1)`` the trail grows with the run (at step :math:`s`,
    :math:`\gamma_s = 1 - 1/\mathrm{clip}(s, 1/(1-\gamma_0), 1/(1-\gamma_1))`, the sum kept
    as a moving average; :mod:`stepsize_tower.horizon`); a float ``horizon`` keeps γ fixed.

    With ``depth=0`` this is exactly :class:`torch.optim.SGD`; it loads its checkpoints
    too (momentum buffers carry over, the tower starts at the checkpoint's ``lr``).

    Args:
        params: iterable of parameters or parameter groups.
{args}

    .. note::
        Step sizes are learned in log space (``a = lr * exp(u)``), so they stay positive
        without clamping, and ``lr`` is an outer factor: a learning-rate scheduler that
        rewrites ``group["lr"]`` rescales the learned step size instead of replacing it.
        :meth:`step_sizes` returns the values in use.
    """

    _options = SGD_OPTIONS + TOWER_OPTIONS

    def __init__(
        self,
        params: Any,
        lr: float | Tensor = 1e-3,
        momentum: float = 0.0,
        dampening: float = 0.0,
        nesterov: bool = False,
        weight_decay: float = 0.0,
        *,
        depth: int | None = None,
        levels: Sequence[Level | str | dict[str, Any]] | None = None,
        granularity: str = "group",
        retreat: bool = True,
        horizon: Horizon | Sequence[float] | None = None,
        maximize: bool = False,
        learn_momentum: bool = False,
        hyper_level: Level | None = None,
        sharded: bool | None = None,
        fused: bool | None = None,
        growth_search: float | None = None,
        schedule_hold_back: float = DEFAULT_SCHEDULE_HOLD_BACK,
        native: bool | None = None,
        lagged: bool = False,
    ) -> None:
        defaults = {
            "lr": lr,
            "momentum": momentum,
            "dampening": dampening,
            "nesterov": nesterov,
            "weight_decay": weight_decay,
            "maximize": maximize,
            "levels": resolve_levels(depth, levels),
            "granularity": granularity,
            "retreat": retreat,
            "horizon": default_horizon() if horizon is None else horizon,
            "learn_momentum": learn_momentum,
            "hyper_level": hyper_level or DEFAULT_HYPER_LEVEL,
            "sharded": sharded,
            "fused": fused,
            "growth_search": growth_search,
            "schedule_hold_back": schedule_hold_back,
            "native": native,
            "lagged": lagged,
        }
        super().__init__(params, defaults)

    def _make_rule(self) -> SGDRule:
        return SGDRule()
