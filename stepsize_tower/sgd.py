"""SGD (with momentum, dampening, Nesterov and weight decay) as the base of a tower."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import torch
from torch import Tensor

from . import _chunks, _fused
from ._docs import TOWER_ARGS
from ._state import keep
from .defaults import DEFAULT_HYPER_LEVEL, default_horizon
from .levels import Level, resolve_levels
from .tower import TowerOptimizer

__all__ = ["SGDRule", "TowerSGD"]


def _grad(group: dict[str, Any], p: Tensor, grad: Tensor) -> Tensor:
    """The gradient of the minimized loss, L2 weight decay included (as in ``torch.optim.SGD``)."""
    g = -grad if group["maximize"] else grad
    if group["weight_decay"] != 0:
        g = g.add(p, alpha=group["weight_decay"])
    return g


class SGDRule:
    """Level 0 of :class:`TowerSGD`: ``d_s = g_s``, ``buf_s``, or ``g_s + μ buf_s`` (Nesterov).

    ``buf_s = μ buf_{s-1} + (1 - τ) g_s`` (``buf_1 = g_1``). The previous direction is the
    momentum buffer itself for heavy ball; plain SGD and Nesterov keep the previous
    gradient (``prev_grad``, one parameter-sized buffer) once a tower is on top. With
    ``learn_momentum`` the tangent ``T_s = ∂d_s/∂μ`` (``buf_{s-1}``, or ``buf_s + μ buf_{s-1}``
    for Nesterov) is kept as ``momentum_tangent``.
    """

    normalized = False

    def hyper_initial(self, group: dict[str, Any]) -> list[float]:
        return [group["momentum"]] if group.get("learn_momentum") else []

    def loss_grad(self, group: dict[str, Any], p: Tensor, grad: Tensor) -> Tensor:
        return _grad(group, p, grad)

    def _mu(self, group: dict[str, Any]) -> float | Tensor:
        return group["tower"]["hyper_value"][0] if group.get("learn_momentum") else group["momentum"]

    @staticmethod
    def _keeps_previous_grad(group: dict[str, Any]) -> bool:
        """Plain SGD and Nesterov need ``g_{s-1}`` to rebuild the previous direction."""
        return group["momentum"] == 0 or group["nesterov"]

    def probe(
        self,
        group: dict[str, Any],
        p: Tensor,
        grad: Tensor,
        state: dict[str, Any],
        a_prev: Tensor,
        *,
        exact: bool = True,
        slope: bool = True,
    ) -> tuple[Tensor, Tensor, list[Tensor]]:
        mu, damp = self._mu(group), group["dampening"]
        g = _chunks.flat(_grad(group, p, grad))
        zero = torch.zeros((), dtype=torch.float64, device=p.device)
        gg = _chunks.dot(g, g) if slope else zero  # only the slope <g_s, d_{0,s}> needs it
        buf = state.get("momentum_buffer")
        prev = state.get("prev_grad")
        g_buf = _chunks.dot(g, _chunks.flat(buf)) if buf is not None else None
        g_prev = _chunks.dot(g, _chunks.flat(prev)) if prev is not None else None
        tangent = state.get("momentum_tangent")
        tangent_dots = (
            [_chunks.dot(g, _chunks.flat(tangent)) if tangent is not None else zero]
            if group.get("learn_momentum")
            else []
        )

        if group["momentum"] == 0:
            return (g_prev if g_prev is not None else zero), gg, tangent_dots
        if not group["nesterov"]:
            dot_prev = g_buf if g_buf is not None else zero
        else:
            dot_prev = zero if (g_prev is None or g_buf is None) else g_prev + mu * g_buf
        if not slope:
            return dot_prev, zero, tangent_dots
        buf_new = gg if g_buf is None else mu * g_buf + (1 - damp) * gg  # <g, buf_s>
        return dot_prev, (gg + mu * buf_new if group["nesterov"] else buf_new), tangent_dots

    def update(
        self,
        group: dict[str, Any],
        params: list[Tensor],
        grads: list[Tensor],
        states: list[dict[str, Any]],
        step_sizes: Sequence[Tensor | float],
    ) -> None:
        mu, damp = self._mu(group), group["dampening"]
        keep_grad = bool(group["levels"]) and self._keeps_previous_grad(group)
        learn = bool(group.get("learn_momentum"))
        if not learn and self._fused_update(group, params, grads, states, step_sizes, keep_grad):
            return
        for p, grad, state, a in zip(params, grads, states, step_sizes, strict=True):
            g = _grad(group, p, grad)
            if keep_grad:
                keep(state, "prev_grad", g)
            d = g
            if group["momentum"] != 0:
                buf = state.get("momentum_buffer")
                if buf is None:
                    buf = state["momentum_buffer"] = g.detach().clone()
                    if learn:
                        keep(state, "momentum_tangent", torch.zeros_like(g))
                else:
                    if learn:
                        keep(state, "momentum_tangent", buf)  # ∂buf_s/∂μ = buf_{s-1}
                    buf.mul_(mu).add_(g, alpha=1 - damp)
                if group["nesterov"]:
                    d = g + mu * buf
                    if learn:  # ∂(g + μ buf_s)/∂μ = buf_s + μ buf_{s-1}
                        state["momentum_tangent"].mul_(mu).add_(buf)
                else:
                    d = buf
            _move(p, d, a)

    @staticmethod
    def _fused_update(
        group: dict[str, Any],
        params: list[Tensor],
        grads: list[Tensor],
        states: list[dict[str, Any]],
        step_sizes: Sequence[Tensor | float],
        keep_grad: bool,
    ) -> bool:
        """torch's fused SGD kernel, one call per distinct step size; False where it does not apply.

        It applies when ``fused`` is not False, the parameters share one CPU/CUDA float
        dtype and device, and the momentum buffers are all present or all absent (the
        kernel's first step initializes them all, as ``torch.optim.SGD`` does).
        """
        companions = [
            (g, st["momentum_buffer"]) if "momentum_buffer" in st else (g,) for g, st in zip(grads, states, strict=True)
        ]
        if not _fused.fused_applies(group, params, companions):
            return False
        momentum = group["momentum"]
        bufs: list[Tensor] = []
        first = False
        if momentum != 0:
            present = [st.get("momentum_buffer") for st in states]
            first = all(b is None for b in present)
            if not first and any(b is None for b in present):
                return False
            if first:
                for st, g in zip(states, grads, strict=True):
                    st["momentum_buffer"] = torch.empty_like(g, memory_format=torch.preserve_format)
            bufs = [st["momentum_buffer"] for st in states]
        if keep_grad:
            for p, grad, st in zip(params, grads, states, strict=True):
                keep(st, "prev_grad", _grad(group, p, grad))
        for lr, idx in _fused.by_step_size(step_sizes):
            torch._fused_sgd_(
                [params[i] for i in idx],
                [grads[i] for i in idx],
                [bufs[i] for i in idx] if bufs else [],
                weight_decay=group["weight_decay"],
                momentum=momentum,
                lr=lr,
                dampening=group["dampening"],
                nesterov=group["nesterov"],
                maximize=group["maximize"],
                is_first_step=first,
            )
        return True

    def trail_dot(
        self, group: dict[str, Any], params: list[Tensor], grads: list[Tensor], states: list[dict[str, Any]]
    ) -> Tensor | None:
        """No compiled kernel for SGD: the engine takes the dot products itself."""
        return None

    def update_with_trail(
        self,
        group: dict[str, Any],
        params: list[Tensor],
        grads: list[Tensor],
        states: list[dict[str, Any]],
        a0: Tensor,
        weight: float,
    ) -> bool:
        """No compiled kernel for SGD: the engine keeps the trail around the update."""
        return False

    def retreat(self, group: dict[str, Any], p: Tensor, state: dict[str, Any], a_prev: Tensor, a_new: Tensor) -> None:
        mu = self._mu(group)
        if group["momentum"] == 0:
            d = state["prev_grad"]
        elif group["nesterov"]:
            d = state["prev_grad"] + mu * state["momentum_buffer"]
        else:
            d = state["momentum_buffer"]
        p.add_(d * (a_prev - a_new).to(d.dtype))


def _move(p: Tensor, d: Tensor, a: Tensor | float) -> None:
    """``p <- p - a d`` for a Python or tensor step size, without a host sync."""
    if isinstance(a, Tensor):
        p.sub_(d * a.to(d.dtype))
    else:
        p.add_(d, alpha=-a)


class TowerSGD(TowerOptimizer):
    __doc__ = rf"""SGD whose step size is learned online by a tower of hypergradient levels.

    .. math::
        \begin{{aligned}}
        &g_s = \nabla L_s(w_{{s-1}}) + \lambda w_{{s-1}}, \qquad
         b_s = \mu b_{{s-1}} + (1-\tau) g_s, \qquad
         d_{{0,s}} = g_s \;|\; b_s \;|\; g_s + \mu b_s \\
        &\hat h_{{1,s}} = -\Big\langle g_s,\; \sum_{{j<s}} \gamma^{{s-1-j}} a_{{0,j}} d_{{0,j}} \Big\rangle
         \qquad \text{{(hypergradient of }} \log a_0 \text{{; }} \gamma = 0 \text{{: one step back)}} \\
        &\text{{levels }} D \dots 1:\; \log a_{{k-1,s}} = \log a_{{k-1,s-1}}
         - \mathrm{{clip}}(a_{{k,s}}\, d_{{k,s}}, \pm 1)
         \qquad\text{{(see }} \texttt{{stepsize\_tower.levels}} \text{{)}} \\
        &w_s = w_{{s-1}} - a_{{0,s}}\, d_{{0,s}}, \qquad a_{{0,s}} = \mathrm{{lr}} \cdot e^{{u_{{0,s}}}}
        \end{{aligned}}

    With ``depth=0`` this is exactly :class:`torch.optim.SGD`; it loads its checkpoints
    too (momentum buffers carry over, the tower starts at the checkpoint's ``lr``).

    Args:
        params: iterable of parameters or parameter groups.
        lr: initial step size, and the outer factor any scheduler rescales (default: 1e-2).
        momentum: momentum factor μ (default: 0).
        dampening: dampening τ for momentum (default: 0).
        nesterov: use Nesterov momentum (default: False).
        weight_decay: L2 penalty λ, part of the loss (default: 0).
        learn_momentum: learn μ online as well, in logit space, with the closed-form
            hypergradient ``-a_0 <g_s, ∂d_{{0,s-1}}/∂μ>`` (default: False).
        hyper_level: the :class:`Level` that learns μ (default: Adam-like, lr 0.01).
        fused: use torch's fused SGD kernel for the update; None picks it when the
            parameters allow (one CPU/CUDA float dtype and device; not with
            ``learn_momentum``) (default: None).
{TOWER_ARGS}
    """

    def __init__(
        self,
        params: Any,
        lr: float | Tensor = 1e-2,
        momentum: float = 0.0,
        dampening: float = 0.0,
        nesterov: bool = False,
        weight_decay: float = 0.0,
        *,
        depth: int | None = None,
        levels: Sequence[Level | str | dict[str, Any]] | None = None,
        granularity: str = "group",
        retreat: bool = True,
        horizon: float | None = None,
        maximize: bool = False,
        learn_momentum: bool = False,
        hyper_level: Level | None = None,
        sharded: bool | None = None,
        fused: bool | None = None,
        growth_search: float | None = None,
    ) -> None:
        if fused is not None and not isinstance(fused, bool):
            raise ValueError(f"Invalid fused: {fused!r}; expected True, False or None")
        if learn_momentum and not 0.0 < momentum < 1.0:
            raise ValueError(f"learn_momentum=True needs an initial momentum in (0, 1); got momentum={momentum}")
        if not 0.0 <= momentum < 1.0:
            raise ValueError(f"Invalid momentum value: {momentum}; expected 0 <= momentum < 1")
        if not 0.0 <= dampening <= 1.0:
            raise ValueError(f"Invalid dampening value: {dampening}; expected 0 <= dampening <= 1")
        if weight_decay < 0.0:
            raise ValueError(f"Invalid weight_decay value: {weight_decay}; expected weight_decay >= 0")
        if nesterov and (momentum <= 0 or dampening != 0):
            raise ValueError("Nesterov momentum requires momentum > 0 and dampening = 0")
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
            "horizon": default_horizon(momentum) if horizon is None else horizon,
            "learn_momentum": learn_momentum,
            "hyper_level": hyper_level or DEFAULT_HYPER_LEVEL,
            "sharded": sharded,
            "fused": fused,
            "growth_search": growth_search,
        }
        super().__init__(params, defaults)

    def _make_rule(self) -> SGDRule:
        return SGDRule()
