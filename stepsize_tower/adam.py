"""Adam and AdamW as the base of a tower."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import torch
from torch import Tensor

from . import _chunks
from ._docs import TOWER_ARGS
from .levels import Level, resolve_levels
from .tower import TowerOptimizer

__all__ = ["AdamRule", "TowerAdam", "TowerAdamW"]

_FUSED_DEVICES = ("cpu", "cuda")


def _bias_corrections(group: dict[str, Any], step: Tensor) -> tuple[Tensor, Tensor]:
    """``(1 - β1^t, sqrt(1 - β2^t))`` as float64 tensors, for a step count tensor ``t``."""
    beta1, beta2 = group["betas"]
    t = step.double()
    return 1 - beta1**t, (1 - beta2**t).sqrt()


class AdamRule:
    """Level 0 of :class:`TowerAdam` / :class:`TowerAdamW`.

    ``d_{0,s} = m̂_s / (sqrt(v̂_s) + eps)``, plus ``λ w_{s-1}`` when decoupled (AdamW).
    The previous direction is recomputed from the moments, so a tower adds no
    parameter-sized buffer; for AdamW, ``w_{s-2} = (w_{s-1} + a u) / (1 - a λ)`` recovers
    the decay term of the last step exactly.
    """

    def __init__(self, decoupled: bool) -> None:
        self.decoupled = decoupled

    def needs_history(self, group: dict[str, Any]) -> bool:
        return False

    def _init(self, p: Tensor, state: dict[str, Any]) -> None:
        if "step" not in state:
            state["step"] = torch.zeros((), dtype=torch.float32, device=p.device)
            state["exp_avg"] = torch.zeros_like(p, memory_format=torch.preserve_format)
            state["exp_avg_sq"] = torch.zeros_like(p, memory_format=torch.preserve_format)

    def _grad(self, group: dict[str, Any], p: Tensor, grad: Tensor) -> Tensor:
        g = -grad if group["maximize"] else grad
        if group["weight_decay"] != 0 and not self.decoupled:
            g = g.add(p, alpha=group["weight_decay"])
        return g

    def probe(
        self, group: dict[str, Any], p: Tensor, grad: Tensor, state: dict[str, Any], a_prev: Tensor
    ) -> tuple[Tensor, Tensor]:
        self._init(p, state)
        beta1, beta2 = group["betas"]
        eps, wd = group["eps"], group["weight_decay"]
        step = state["step"]
        bc1_prev, bc2s_prev = _bias_corrections(group, step)
        bc1_new, bc2s_new = _bias_corrections(group, step + 1)
        g_all = _chunks.flat(self._grad(group, p, grad))
        m_all, v_all = _chunks.flat(state["exp_avg"]), _chunks.flat(state["exp_avg_sq"])
        p_all = _chunks.flat(p)
        g_u_prev = torch.zeros((), dtype=torch.float64, device=p.device)
        g_u_new = torch.zeros_like(g_u_prev)
        g_w = torch.zeros_like(g_u_prev)
        first = bool(step == 0) if step.device.type == "cpu" else False
        for g, m, v, w in _chunks.chunks(g_all, m_all, v_all, p_all):
            if not first:
                den = v.sqrt().div_(bc2s_prev.to(v.dtype)).add_(eps)
                g_u_prev += _chunks.dot(g, m.div(den))
            m_new = m.lerp(g, 1 - beta1)
            den = v.mul(beta2).addcmul_(g, g, value=1 - beta2).sqrt_().div_(bc2s_new.to(v.dtype)).add_(eps)
            g_u_new += _chunks.dot(g, m_new.div_(den))
            if self.decoupled and wd != 0:
                g_w += _chunks.dot(g, w)
        dot_prev = torch.where(step > 0, g_u_prev / bc1_prev, 0.0)
        slope = g_u_new / bc1_new
        if self.decoupled and wd != 0:
            dot_prev = torch.where(step > 0, (dot_prev + wd * g_w) / (1 - a_prev * wd), 0.0)
            slope = slope + wd * g_w
        return dot_prev, slope

    def update(
        self,
        group: dict[str, Any],
        params: list[Tensor],
        grads: list[Tensor],
        states: list[dict[str, Any]],
        step_sizes: Sequence[Tensor | float],
    ) -> None:
        for p, st in zip(params, states, strict=True):
            self._init(p, st)
        if self._use_fused(group, params):
            self._update_fused(group, params, grads, states, step_sizes)
            return
        beta1, beta2 = group["betas"]
        eps, wd = group["eps"], group["weight_decay"]
        for p, grad, st, a in zip(params, grads, states, step_sizes, strict=True):
            g = self._grad(group, p, grad)
            st["step"] += 1
            st["exp_avg"].lerp_(g, 1 - beta1)
            st["exp_avg_sq"].mul_(beta2).addcmul_(g, g, value=1 - beta2)
            bc1, bc2s = _bias_corrections(group, st["step"])
            denom = (st["exp_avg_sq"].sqrt() / bc2s.to(p.dtype)).add_(eps)
            if self.decoupled and wd != 0:
                p.mul_(1 - a * wd)
            p.sub_(st["exp_avg"].div(denom).mul_((a / bc1).to(p.dtype)))

    def _use_fused(self, group: dict[str, Any], params: list[Tensor]) -> bool:
        fused = group.get("fused")
        if fused is False:
            return False
        return (
            all(p.device.type in _FUSED_DEVICES and p.dtype.is_floating_point for p in params)
            and len({(p.device, p.dtype) for p in params}) == 1
        )

    def _update_fused(
        self,
        group: dict[str, Any],
        params: list[Tensor],
        grads: list[Tensor],
        states: list[dict[str, Any]],
        step_sizes: Sequence[Tensor | float],
    ) -> None:
        """One pass of torch's fused Adam kernel per distinct step size (one call per group by default)."""
        beta1, beta2 = group["betas"]
        kernel = torch._fused_adamw_ if self.decoupled else torch._fused_adam_
        buckets: dict[int, list[int]] = {}
        for i, a in enumerate(step_sizes):
            buckets.setdefault(id(a), []).append(i)
        for idx in buckets.values():
            a = step_sizes[idx[0]]
            steps = [states[i]["step"] for i in idx]
            torch._foreach_add_(steps, 1)
            lr = a if isinstance(a, Tensor) else torch.tensor(float(a), dtype=torch.float64)
            kernel(
                [params[i] for i in idx],
                [grads[i] for i in idx],
                [states[i]["exp_avg"] for i in idx],
                [states[i]["exp_avg_sq"] for i in idx],
                [],
                steps,
                amsgrad=False,
                lr=lr,
                beta1=beta1,
                beta2=beta2,
                weight_decay=group["weight_decay"],
                eps=group["eps"],
                maximize=group["maximize"],
            )

    def retreat(self, group: dict[str, Any], p: Tensor, state: dict[str, Any], a_prev: Tensor, a_new: Tensor) -> None:
        bc1, bc2s = _bias_corrections(group, state["step"])
        u = state["exp_avg"].div((state["exp_avg_sq"].sqrt() / bc2s.to(p.dtype)).add_(group["eps"]))
        u.div_(bc1.to(p.dtype))
        wd = group["weight_decay"]
        if self.decoupled and wd != 0:
            w_before = (p + a_prev.to(p.dtype) * u) / (1 - a_prev * wd).to(p.dtype)
            p.copy_(w_before * (1 - a_new * wd).to(p.dtype) - a_new.to(p.dtype) * u)
        else:
            p.add_(u * (a_prev - a_new).to(p.dtype))


class TowerAdam(TowerOptimizer):
    __doc__ = rf"""Adam whose step size is learned online by a tower of hypergradient levels.

    .. math::
        \begin{{aligned}}
        &g_s = \nabla L_s(w_{{s-1}}) + \lambda w_{{s-1}}, \quad
         m_s = \beta_1 m_{{s-1}} + (1-\beta_1) g_s, \quad
         v_s = \beta_2 v_{{s-1}} + (1-\beta_2) g_s^2 \\
        &d_{{0,s}} = \frac{{m_s / (1-\beta_1^s)}}{{\sqrt{{v_s/(1-\beta_2^s)}} + \epsilon}}
         \quad(\text{{AdamW: }} + \lambda w_{{s-1}} \text{{ and no }} \lambda \text{{ in }} g_s) \\
        &\hat h_{{1,s}} = -a_{{0,s-1}}\,\langle g_s, d_{{0,s-1}}\rangle
         \qquad \text{{(the hypergradient of }} \log a_0 \text{{)}} \\
        &\text{{levels }} D \dots 1:\; \log a_{{k-1,s}} = \log a_{{k-1,s-1}} - a_{{k,s}}\, d_{{k,s}} \\
        &w_s = w_{{s-1}} - a_{{0,s}}\, d_{{0,s}}, \qquad a_{{0,s}} = \mathrm{{lr}} \cdot e^{{u_{{0,s}}}}
        \end{{aligned}}

    With ``depth=0`` this is exactly :class:`torch.optim.Adam` (``TowerAdamW``:
    :class:`torch.optim.AdamW`). The update uses torch's fused Adam kernel where it
    applies (``fused=None``); the previous direction is recomputed from the moments, so
    the tower adds no parameter-sized buffer.

    Args:
        params: iterable of parameters or parameter groups.
        lr: initial step size, and the outer factor any scheduler rescales (default: 1e-3).
        betas: coefficients of the running averages (default: (0.9, 0.999)).
        eps: added to the denominator (default: 1e-8).
        weight_decay: L2 penalty λ (TowerAdamW: decoupled decay) (default: 0; TowerAdamW: 1e-2).
        fused: use torch's fused kernel for the update; None picks it when the
            parameters allow (default: None).
{TOWER_ARGS}
    """

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
        levels: Sequence[Level | str] | None = None,
        granularity: str = "group",
        retreat: bool = True,
        maximize: bool = False,
        fused: bool | None = None,
    ) -> None:
        if weight_decay is None:
            weight_decay = self._default_weight_decay
        if not 0.0 <= eps:
            raise ValueError(f"Invalid epsilon value: {eps}; expected eps >= 0")
        if len(betas) != 2 or not all(0.0 <= b < 1.0 for b in betas):
            raise ValueError(f"Invalid betas: {betas}; expected two numbers in [0, 1)")
        if not 0.0 <= weight_decay:
            raise ValueError(f"Invalid weight_decay value: {weight_decay}; expected weight_decay >= 0")
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
        }
        super().__init__(params, defaults, AdamRule(decoupled=self._decoupled))


class TowerAdamW(TowerAdam):
    __doc__ = TowerAdam.__doc__
    _decoupled = True
    _default_weight_decay = 1e-2
