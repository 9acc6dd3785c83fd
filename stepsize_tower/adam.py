"""Adam and AdamW as the base of a tower."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import torch
from torch import Tensor

from . import _chunks, _compiled, _fused
from ._docs import TOWER_ARGS
from ._state import keep
from .defaults import DEFAULT_FIRST_STEP_LIMIT, DEFAULT_HORIZON, DEFAULT_HYPER_LEVEL
from .levels import Level, resolve_levels
from .tower import TowerOptimizer

__all__ = ["AdamRule", "TowerAdam", "TowerAdamW"]

Beta = float | Tensor


def _betas(group: dict[str, Any]) -> tuple[Beta, Beta]:
    """The betas in use: the group's, or the learned ones (float64 tensors) with ``learn_betas``."""
    if group.get("learn_betas"):
        value = group["tower"]["hyper_value"]
        return value[0], value[1]
    beta1, beta2 = group["betas"]
    return beta1, beta2


def _bias_corrections(group: dict[str, Any], step: Tensor) -> tuple[Tensor, Tensor]:
    """``(1 - β1^t, sqrt(1 - β2^t))`` as float64 tensors, for a step count tensor ``t``."""
    beta1, beta2 = _betas(group)
    t = step.double()
    return 1 - beta1**t, (1 - beta2**t).sqrt()


def _update_moments(m: Tensor, v: Tensor, g: Tensor, beta1: Beta, beta2: Beta) -> None:
    """In place: ``m <- β1 m + (1-β1) g``, ``v <- β2 v + (1-β2) g²`` (torch.optim's order of operations)."""
    if isinstance(beta1, Tensor) or isinstance(beta2, Tensor):
        m.lerp_(g, (1 - beta1).to(m.dtype) if isinstance(beta1, Tensor) else 1 - beta1)
        v.mul_(beta2 if not isinstance(beta2, Tensor) else beta2.to(v.dtype)).addcmul_(
            g, g * (1 - beta2 if not isinstance(beta2, Tensor) else (1 - beta2).to(v.dtype))
        )
    else:
        m.lerp_(g, 1 - beta1)
        v.mul_(beta2).addcmul_(g, g, value=1 - beta2)


class AdamRule:
    """Level 0 of :class:`TowerAdam` / :class:`TowerAdamW`.

    ``d_{0,s} = m̂_s / (sqrt(v̂_s) + eps)``, plus ``λ w_{s-1}`` when decoupled (AdamW).
    The previous direction is recomputed from the moments, so a tower adds no
    parameter-sized buffer; for AdamW, ``w_{s-2} = (w_{s-1} + a u) / (1 - a λ)`` recovers
    the decay term of the last step exactly.

    With ``learn_betas`` the tangents ``∂d_s/∂β1`` and ``∂d_s/∂β2`` are kept per parameter
    (``beta1_tangent``, ``beta2_tangent``), one step back (``m_{s-1}``, ``v_{s-1}`` constant)::

        ∂m̂/∂β1 = (m_{s-1} - g_s) / (1-β1^t) + m_s t β1^(t-1) / (1-β1^t)²
        ∂v̂/∂β2 = (v_{s-1} - g_s²) / (1-β2^t) + v_s t β2^(t-1) / (1-β2^t)²
        ∂d/∂β1 = (∂m̂/∂β1) / (sqrt(v̂) + eps)
        ∂d/∂β2 = -m̂ / (sqrt(v̂) + eps)² · (∂v̂/∂β2) / (2 sqrt(v̂))
    """

    normalized = True

    def __init__(self, decoupled: bool) -> None:
        self.decoupled = decoupled

    def hyper_initial(self, group: dict[str, Any]) -> list[float]:
        return list(group["betas"]) if group.get("learn_betas") else []

    def _init(self, p: Tensor, state: dict[str, Any]) -> None:
        if "step" not in state:
            state["step"] = torch.zeros((), dtype=torch.float32, device=p.device)
            state["exp_avg"] = torch.zeros_like(p, memory_format=torch.preserve_format)
            state["exp_avg_sq"] = torch.zeros_like(p, memory_format=torch.preserve_format)

    def loss_grad(self, group: dict[str, Any], p: Tensor, grad: Tensor) -> Tensor:
        return self._grad(group, p, grad)

    def _grad(self, group: dict[str, Any], p: Tensor, grad: Tensor) -> Tensor:
        g = -grad if group["maximize"] else grad
        if group["weight_decay"] != 0 and not self.decoupled:
            g = g.add(p, alpha=group["weight_decay"])
        return g

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
        self._init(p, state)
        beta1, beta2 = _betas(group)
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
        for g, m, v, w in _chunks.chunks(g_all, m_all, v_all, p_all) if exact else ():
            if not first:
                den = v.sqrt().div_(bc2s_prev.to(v.dtype)).add_(eps)
                g_u_prev += _chunks.dot(g, m.div(den))
            if slope:  # the start-up test's <g_s, d_{0,s}>: the direction this step would take
                m_new, v_new = m.clone(), v.clone()
                _update_moments(m_new, v_new, g, beta1, beta2)
                den = v_new.sqrt_().div_(bc2s_new.to(v.dtype)).add_(eps)
                g_u_new += _chunks.dot(g, m_new.div_(den))
            if self.decoupled and wd != 0:
                g_w += _chunks.dot(g, w)
        dot_prev = torch.where(step > 0, g_u_prev / bc1_prev, 0.0)
        new_slope = g_u_new / bc1_new
        if self.decoupled and wd != 0:
            dot_prev = torch.where(step > 0, (dot_prev + wd * g_w) / (1 - a_prev * wd), 0.0)
            new_slope = new_slope + wd * g_w
        tangent_dots = []
        if group.get("learn_betas"):
            for key in ("beta1_tangent", "beta2_tangent"):
                t = state.get(key)
                tangent_dots.append(_chunks.dot(g_all, _chunks.flat(t)) if t is not None else g_u_prev * 0)
        return dot_prev, new_slope, tangent_dots

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
        if self._use_fused(group, params, grads, states):
            self._update_fused(group, params, grads, states, step_sizes)
            return
        beta1, beta2 = _betas(group)
        eps, wd = group["eps"], group["weight_decay"]
        learn = bool(group.get("learn_betas"))
        for p, grad, st, a in zip(params, grads, states, step_sizes, strict=True):
            g = self._grad(group, p, grad)
            st["step"] += 1
            m, v = st["exp_avg"], st["exp_avg_sq"]
            old = (m.clone(), v.clone()) if learn else None
            _update_moments(m, v, g, beta1, beta2)
            bc1, bc2s = _bias_corrections(group, st["step"])
            denom = (v.sqrt() / bc2s.to(p.dtype)).add_(eps)
            if old is not None:
                self._keep_tangents(st, g, old[0], old[1], denom, beta1, beta2)
            if self.decoupled and wd != 0:
                p.mul_(1 - a * wd)
            p.sub_(st["exp_avg"].div(denom).mul_((a / bc1).to(p.dtype)))

    @staticmethod
    def _keep_tangents(
        st: dict[str, Any], g: Tensor, m_old: Tensor, v_old: Tensor, denom: Tensor, beta1: Beta, beta2: Beta
    ) -> None:
        """Store ``∂d_s/∂β1`` and ``∂d_s/∂β2`` (closed forms in the class docstring)."""
        t = st["step"].double()
        bc1, bc2 = 1 - beta1**t, 1 - beta2**t
        m, v = st["exp_avg"], st["exp_avg_sq"]
        dm = (m_old - g) / bc1 + m * (t * beta1 ** (t - 1) / bc1**2)
        v_hat = v / bc2
        dv = (v_old - g * g) / bc2 + v * (t * beta2 ** (t - 1) / bc2**2)
        sqrt_v = v_hat.sqrt()
        # At t = 1 the bias corrections make d_1 = g / (|g| + eps) whatever the betas: both
        # tangents are exactly 0, and the closed forms leave only rounding noise (~1e-18),
        # whose sign a normalized hyper level would turn into a full-size move.
        first = t <= 1
        t1 = torch.where(first, torch.zeros_like(v), dm / denom)
        t2 = torch.where(first | (sqrt_v <= 0), torch.zeros_like(v), -(m / bc1) / denom**2 * dv / (2 * sqrt_v))
        keep(st, "beta1_tangent", t1, g.dtype)
        keep(st, "beta2_tangent", t2, g.dtype)

    def _use_fused(
        self, group: dict[str, Any], params: list[Tensor], grads: list[Tensor], states: list[dict[str, Any]]
    ) -> bool:
        companions = [(g, st["exp_avg"], st["exp_avg_sq"]) for g, st in zip(grads, states, strict=True)]
        return not group.get("learn_betas") and _fused.fused_applies(group, params, companions)

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
        for lr, idx in _fused.by_step_size(step_sizes):
            steps = [states[i]["step"] for i in idx]
            torch._foreach_add_(steps, 1)
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

    # ------------------------------------------------------------ compiled trail (opt-in)

    def _compiled_applies(self, group: dict[str, Any], params: list[Tensor], states: list[dict[str, Any]]) -> bool:
        """``compiled=True``, one step size for the group, float32 CPU/CUDA tensors, and a compiler."""
        return (
            bool(group.get("compiled"))
            and not group.get("learn_betas")
            and group["granularity"] == "group"
            and bool(params)
            and all(p.dtype == torch.float32 and p.device.type in ("cpu", "cuda") for p in params)
            and len({p.device for p in params}) == 1
            and all("update_ema" in st for st in states)
            and _compiled.available()
        )

    def trail_dot(
        self, group: dict[str, Any], params: list[Tensor], grads: list[Tensor], states: list[dict[str, Any]]
    ) -> Tensor | None:
        """``Σ <g_s, E>`` over the group in one compiled read pass, or None where that does not apply."""
        if not self._compiled_applies(group, params, states):
            return None
        return _compiled.two_pass_dot(
            grads,
            [st["update_ema"] for st in states],
            params=params,
            weight_decay=group["weight_decay"],
            decoupled=self.decoupled,
            maximize=group["maximize"],
        )

    def update_with_trail(
        self,
        group: dict[str, Any],
        params: list[Tensor],
        grads: list[Tensor],
        states: list[dict[str, Any]],
        a0: Tensor,
        weight: float,
    ) -> bool:
        """The Adam step with step size ``a0`` and ``E <- (1 - weight) E + weight a0 d`` in one compiled pass.

        Returns False (and changes nothing) where the compiled kernel does not apply; the
        engine then takes torch's fused kernel plus the two trail passes.
        """
        for p, st in zip(params, states, strict=True):
            self._init(p, st)
        if not self._compiled_applies(group, params, states):
            return False
        beta1, beta2 = group["betas"]
        steps = [st["step"] for st in states]
        torch._foreach_add_(steps, 1)
        _compiled.adam_trail_update(
            params,
            grads,
            [st["exp_avg"] for st in states],
            [st["exp_avg_sq"] for st in states],
            [st["update_ema"] for st in states],
            steps,
            a0,
            beta1,
            beta2,
            group["eps"],
            group["weight_decay"],
            self.decoupled,
            group["maximize"],
            weight,
        )
        return True

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
        &\hat h_{{1,s}} = -\Big\langle g_s,\; \sum_{{j<s}} \gamma^{{s-1-j}} a_{{0,j}} d_{{0,j}} \Big\rangle
         \qquad \text{{(hypergradient of }} \log a_0 \text{{; }} \gamma = 0 \text{{: one step back)}} \\
        &\text{{levels }} D \dots 1:\; \log a_{{k-1,s}} = \log a_{{k-1,s-1}}
         - \mathrm{{clip}}(a_{{k,s}}\, d_{{k,s}}, \pm 1) \\
        &w_s = w_{{s-1}} - a_{{0,s}}\, d_{{0,s}}, \qquad a_{{0,s}} = \mathrm{{lr}} \cdot e^{{u_{{0,s}}}}
        \end{{aligned}}

    With ``depth=0`` this is exactly :class:`torch.optim.Adam` (``TowerAdamW``:
    :class:`torch.optim.AdamW`); it loads their checkpoints too (moments and step counts
    carry over, the tower starts at the checkpoint's ``lr``). The update uses torch's fused
    Adam kernel where it applies (``fused=None``). The trail of updates (``horizon > 0``) is one parameter-sized
    buffer; with ``horizon=0`` the previous direction is recomputed from the moments and the
    tower adds none.

    Args:
        params: iterable of parameters or parameter groups.
        lr: initial step size, and the outer factor any scheduler rescales (default: 1e-3).
        betas: coefficients of the running averages (default: (0.9, 0.999)).
        eps: added to the denominator (default: 1e-8).
        weight_decay: L2 penalty λ (TowerAdamW: decoupled decay) (default: 0; TowerAdamW: 1e-2).
        fused: use torch's fused kernel for the update; None picks it when the
            parameters allow (default: None).
        learn_betas: learn β1 and β2 online as well, in logit space, with closed-form
            hypergradients (see :class:`AdamRule`); uses the unfused update (default: False).
        hyper_level: the :class:`Level` that learns the betas (default: Adam-like, lr 0.01).
        compiled: run the step as two kernels compiled with ``torch.compile`` (a read pass
            for the hypergradient, then one loop that updates weights, moments and the trail
            together) instead of torch's fused kernel plus three passes. Same results up to
            float32 rounding. The first step compiles (seconds); needs float32 parameters,
            ``granularity="group"``, ``horizon > 0`` and a working inductor backend (a C++
            compiler on CPU), and silently uses the default path otherwise (default: False).
        first_step_limit: with levels, the first step size is cut to
            ``min(a_0, first_step_limit * s)``, ``s`` the geometric mean over the group's
            nonzero tensors of their root-mean-square entry: an Adam step moves every
            weight by about ``a_0``, and a first step larger than the weights themselves
            wrecks the model where the start-up test cannot see it. ``None`` turns it off
            (default: 0.5, measured; see :mod:`stepsize_tower._first_step`).
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
        levels: Sequence[Level | str | dict[str, Any]] | None = None,
        granularity: str = "group",
        retreat: bool = True,
        horizon: float | None = None,
        maximize: bool = False,
        fused: bool | None = None,
        learn_betas: bool = False,
        hyper_level: Level | None = None,
        sharded: bool | None = None,
        compiled: bool = False,
        first_step_limit: float | None = DEFAULT_FIRST_STEP_LIMIT,
        growth_search: float | None = None,
    ) -> None:
        if weight_decay is None:
            weight_decay = self._default_weight_decay
        if not 0.0 <= eps:
            raise ValueError(f"Invalid epsilon value: {eps}; expected eps >= 0")
        if len(betas) != 2 or not all(0.0 <= b < 1.0 for b in betas):
            raise ValueError(f"Invalid betas: {betas}; expected two numbers in [0, 1)")
        if learn_betas and not all(0.0 < b < 1.0 for b in betas):
            raise ValueError(f"learn_betas=True needs initial betas in (0, 1); got betas={betas}")
        if not isinstance(compiled, bool):
            raise ValueError(f"Invalid compiled: {compiled!r}; expected True or False")
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
            "horizon": DEFAULT_HORIZON if horizon is None else horizon,
            "learn_betas": learn_betas,
            "hyper_level": hyper_level or DEFAULT_HYPER_LEVEL,
            "sharded": sharded,
            "compiled": compiled,
            "first_step_limit": first_step_limit,
            "growth_search": growth_search,
        }
        super().__init__(params, defaults)

    def _make_rule(self) -> AdamRule:
        return AdamRule(decoupled=self._decoupled)


class TowerAdamW(TowerAdam):
    __doc__ = TowerAdam.__doc__  # type: ignore[assignment]
    _decoupled = True
    _default_weight_decay = 1e-2
