"""TowerAdam and TowerAdamW: Adam and AdamW with a learned step size."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from torch import Tensor

from .bases.adam import AdamRule
from .horizon import Horizon
from .levels import Level
from .options import (
    ADAM_OPTIONS,
    DEFAULT_ADAM_HORIZON,
    DEFAULT_FIRST_STEP_LIMIT,
    DEFAULT_HYPER_LEVEL,
    DEFAULT_SCHEDULE_HOLD_BACK,
    TOWER_OPTIONS,
    resolve_levels,
)
from .tower import TowerOptimizer

__all__ = ["TowerAdam", "TowerAdamW"]


class TowerAdam(TowerOptimizer):
    r"""Adam whose step size is learned online by a tower of hypergradient levels.

    .. math::
        \begin{aligned}
        &g_s = \nabla L_s(w_{s-1}) + \lambda w_{s-1}, \quad
         m_s = \beta_1 m_{s-1} + (1-\beta_1) g_s, \quad
         v_s = \beta_2 v_{s-1} + (1-\beta_2) g_s^2 \\
        &d_{0,s} = \frac{m_s / (1-\beta_1^s)}{\sqrt{v_s/(1-\beta_2^s)} + \epsilon}
         \quad(\text{AdamW: } + \lambda w_{s-1} \text{ and no } \lambda \text{ in } g_s) \\
        &\hat h_{1,s} = -\Big\langle g_s,\; \sum_{j<s} \gamma^{s-1-j} a_{0,j} d_{0,j} \Big\rangle
         \qquad \text{(hypergradient of } \log a_0 \text{; } \gamma = 0 \text{: one step back)} \\
        &\text{levels } D \dots 1:\; \log a_{k-1,s} = \log a_{k-1,s-1}
         - \mathrm{clip}(a_{k,s}\, d_{k,s}, \pm 1) \\
        &w_s = w_{s-1} - a_{0,s}\, d_{0,s}, \qquad a_{0,s} = \mathrm{lr} \cdot e^{u_{0,s}}
        \end{aligned}

    With ``depth=0`` this is exactly :class:`torch.optim.Adam` (``TowerAdamW``:
    :class:`torch.optim.AdamW`); it loads their checkpoints too (moments and step counts
    carry over, the tower starts at the checkpoint's ``lr``). On the CPU the step runs in the
    package's own C++ kernel (``native=None``: built on the first step, then cached); elsewhere
    it uses torch's fused Adam kernel where it applies (``fused=None``). The trail of updates
    (``horizon > 0``) is one parameter-sized buffer; with ``horizon=0`` the previous direction
    is recomputed from the moments and the tower adds none.

    Args:
        params: iterable of parameters or parameter groups.
{args}

    .. note::
        Step sizes are learned in log space (``a = lr * exp(u)``), so they stay positive
        without clamping, and ``lr`` is an outer factor: a learning-rate scheduler that
        rewrites ``group["lr"]`` rescales the learned step size instead of replacing it.
        :meth:`step_sizes` returns the values in use.
    """

    _options = ADAM_OPTIONS + TOWER_OPTIONS

    _decoupled = False
    _default_weight_decay = 0.0

    def __init__(
        self,
        params: Any,
        lr: float | Tensor = 1e-3,
        betas: tuple[float, float] = (0.9, 0.999),
        eps: float = 1e-8,
        weight_decay: float | None = None,
        *,
        depth: int | None = None,
        levels: Sequence[Level | str | dict[str, Any]] | None = None,
        granularity: str = "group",
        retreat: bool = True,
        horizon: Horizon | Sequence[float] | None = None,
        maximize: bool = False,
        fused: bool | None = None,
        learn_betas: bool = False,
        hyper_level: Level | None = None,
        sharded: bool | None = None,
        compiled: bool = False,
        native: bool | str | None = None,
        first_step_limit: float | None = DEFAULT_FIRST_STEP_LIMIT,
        growth_search: float | None = None,
        schedule_hold_back: float = DEFAULT_SCHEDULE_HOLD_BACK,
        lagged: bool = True,
    ) -> None:
        if weight_decay is None:
            weight_decay = self._default_weight_decay
        defaults = {
            "lr": lr,
            "betas": tuple(betas),
            "eps": eps,
            "weight_decay": weight_decay,
            "maximize": maximize,
            "fused": fused,
            "levels": resolve_levels(depth, levels),
            "granularity": granularity,
            "retreat": retreat,
            "horizon": DEFAULT_ADAM_HORIZON if horizon is None else horizon,
            "learn_betas": learn_betas,
            "hyper_level": hyper_level or DEFAULT_HYPER_LEVEL,
            "sharded": sharded,
            "compiled": compiled,
            "native": native,
            "first_step_limit": first_step_limit,
            "growth_search": growth_search,
            "schedule_hold_back": schedule_hold_back,
            "lagged": lagged,
        }
        super().__init__(params, defaults)

    def _make_rule(self) -> AdamRule:
        return AdamRule(decoupled=self._decoupled)


class TowerAdamW(TowerAdam):
    __doc__ = TowerAdam.__doc__  # type: ignore[assignment]
    _decoupled = True
    _default_weight_decay = 1e-2
