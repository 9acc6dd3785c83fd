"""Adam and AdamW as level 0 of a tower."""

from __future__ import annotations

from collections.abc import Sequence
from types import ModuleType
from typing import Any

import torch
from torch import Tensor
from torch.optim.adam import adam as torch_adam

from . import chunks, compiled, fused, masking, native
from .adam_math import Beta, adam_denominator, adam_direction, betas_in_use, bias_corrections, update_moments
from .buffers import keep
from .grad import loss_grad
from .protocol import Probe

__all__ = ["AdamRule"]


def _init(p: Tensor, state: dict[str, Any]) -> None:
    if "step" not in state:
        state["step"] = torch.zeros((), dtype=torch.float32, device=p.device)
        state["exp_avg"] = torch.zeros_like(p, memory_format=torch.preserve_format)
        state["exp_avg_sq"] = torch.zeros_like(p, memory_format=torch.preserve_format)


class AdamRule:
    """Level 0 of :class:`~stepsize_tower.TowerAdam` / :class:`~stepsize_tower.TowerAdamW`.

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

    def learned_initial(self, group: dict[str, Any]) -> list[float]:
        return list(group["betas"]) if group.get("learn_betas") else []

    def loss_grad(self, group: dict[str, Any], p: Tensor, grad: Tensor) -> Tensor:
        l2 = 0.0 if self.decoupled else group["weight_decay"]
        return loss_grad(grad, p, maximize=group["maximize"], l2=l2)

    def probe(
        self,
        group: dict[str, Any],
        learned: Tensor | None,
        p: Tensor,
        grad: Tensor,
        state: dict[str, Any],
        a_prev: Tensor,
        *,
        exact: bool = True,
        slope: bool = True,
    ) -> Probe:
        _init(p, state)
        betas = betas_in_use(group, learned)
        eps, wd, step = group["eps"], group["weight_decay"], state["step"]
        bc1_prev, bc2s_prev = bias_corrections(betas, step)
        bc1_new, bc2s_new = bias_corrections(betas, step + 1)
        g_all = chunks.flat(self.loss_grad(group, p, grad))
        m_all, v_all, p_all = chunks.flat(state["exp_avg"]), chunks.flat(state["exp_avg_sq"]), chunks.flat(p)
        g_u_prev = torch.zeros((), dtype=torch.float64, device=p.device)
        g_u_new, g_w = torch.zeros_like(g_u_prev), torch.zeros_like(g_u_prev)
        for g, m, v, w in chunks.chunks(g_all, m_all, v_all, p_all) if exact else ():
            # On the first step this is 0/0 (no moments yet); the where below discards it.
            g_u_prev += chunks.dot(g, adam_direction(m, v, bc2s_prev.to(v.dtype), eps))
            if slope:  # the start-up test's <g_s, d_{0,s}>: the direction this step would take
                m_new, v_new = m.clone(), v.clone()
                update_moments(m_new, v_new, g, *betas)
                g_u_new += chunks.dot(g, adam_direction(m_new, v_new, bc2s_new.to(v.dtype), eps))
            if self.decoupled and wd != 0:
                g_w += chunks.dot(g, w)
        dot_prev = torch.where(step > 0, g_u_prev / bc1_prev, 0.0)
        new_slope = g_u_new / bc1_new
        if self.decoupled and wd != 0:
            dot_prev = torch.where(step > 0, (dot_prev + wd * g_w) / (1 - a_prev * wd), 0.0)
            new_slope = new_slope + wd * g_w
        tangent_dots = []
        if group.get("learn_betas"):
            for key in ("beta1_tangent", "beta2_tangent"):
                t = state.get(key)
                tangent_dots.append(chunks.dot(g_all, chunks.flat(t)) if t is not None else torch.zeros_like(g_u_prev))
        return Probe(dot_prev, new_slope, tangent_dots)

    def update(
        self,
        group: dict[str, Any],
        learned: Tensor | None,
        params: list[Tensor],
        grads: list[Tensor],
        states: list[dict[str, Any]],
        step_sizes: Sequence[Tensor | float],
        skip: Tensor | None = None,
    ) -> None:
        for p, st in zip(params, states, strict=True):
            _init(p, st)
        companions = [(g, st["exp_avg"], st["exp_avg_sq"]) for g, st in zip(grads, states, strict=True)]
        if not group.get("learn_betas") and fused.fused_applies(group, params, companions):
            self._update_fused(group, params, grads, states, step_sizes, skip)
            return

        def one(i: int) -> None:
            self._update_one(group, learned, params[i], grads[i], states[i], step_sizes[i])

        masking.per_tensor(skip, params, states, one)

    def _update_one(
        self,
        group: dict[str, Any],
        learned: Tensor | None,
        p: Tensor,
        grad: Tensor,
        st: dict[str, Any],
        a: Tensor | float,
    ) -> None:
        """The reference update of one tensor (any layout, learned betas)."""
        betas = betas_in_use(group, learned)
        eps, wd = group["eps"], group["weight_decay"]
        g = self.loss_grad(group, p, grad)
        st["step"] += 1
        m, v = st["exp_avg"], st["exp_avg_sq"]
        old = (m.clone(), v.clone()) if group.get("learn_betas") else None
        update_moments(m, v, g, *betas)
        bc1, bc2s = bias_corrections(betas, st["step"])
        if old is not None:
            denom = adam_denominator(v, bc2s.to(p.dtype), eps)
            _keep_tangents(st, g, old[0], old[1], denom, *betas)
        if self.decoupled and wd != 0:
            p.mul_(1 - a * wd)
        p.sub_(adam_direction(m, v, bc2s.to(p.dtype), eps).mul_((a / bc1).to(p.dtype)))

    def torch_update(
        self, group: dict[str, Any], params: list[Tensor], grads: list[Tensor], states: list[dict[str, Any]]
    ) -> None:
        """``torch.optim.Adam`` / ``AdamW``'s functional update (its default path unless ``fused`` applies)."""
        for p, st in zip(params, states, strict=True):
            _init(p, st)
        companions = [(g, st["exp_avg"], st["exp_avg_sq"]) for g, st in zip(grads, states, strict=True)]
        use_fused = group.get("fused") is True and fused.fused_applies(group, params, companions)
        beta1, beta2 = group["betas"]
        torch_adam(
            params,
            grads,
            [st["exp_avg"] for st in states],
            [st["exp_avg_sq"] for st in states],
            [],
            [st["step"] for st in states],
            fused=True if use_fused else None,
            decoupled_weight_decay=self.decoupled,
            amsgrad=False,
            beta1=beta1,
            beta2=beta2,
            lr=group["lr"],
            weight_decay=group["weight_decay"],
            eps=group["eps"],
            maximize=group["maximize"],
        )

    def _update_fused(
        self,
        group: dict[str, Any],
        params: list[Tensor],
        grads: list[Tensor],
        states: list[dict[str, Any]],
        step_sizes: Sequence[Tensor | float],
        skip: Tensor | None = None,
    ) -> None:
        """One pass of torch's fused Adam kernel per distinct step size (one call per group by default).

        With ``skip``, the kernel's ``found_inf`` leaves weights and moments unchanged where it
        holds, and the step counts are taken back by it, as ``torch.optim.Adam(fused=True)`` does.
        """
        beta1, beta2 = group["betas"]
        kernel = torch._fused_adamw_ if self.decoupled else torch._fused_adam_
        for lr, idx in fused.by_step_size(step_sizes):
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
                **masking.found_inf(skip),
            )
            if skip is not None:
                torch._foreach_sub_(steps, [skip.to(steps[0].dtype)] * len(steps))

    def retreat(
        self,
        group: dict[str, Any],
        learned: Tensor | None,
        p: Tensor,
        state: dict[str, Any],
        a_prev: Tensor,
        a_new: Tensor,
    ) -> None:
        bc1, bc2s = bias_corrections(betas_in_use(group, learned), state["step"])
        u = adam_direction(state["exp_avg"], state["exp_avg_sq"], bc2s.to(p.dtype), group["eps"])
        u.div_(bc1.to(p.dtype))
        wd = group["weight_decay"]
        if self.decoupled and wd != 0:
            w_before = (p + a_prev.to(p.dtype) * u) / (1 - a_prev * wd).to(p.dtype)
            p.copy_(w_before * (1 - a_new * wd).to(p.dtype) - a_new.to(p.dtype) * u)
        else:
            p.add_(u * (a_prev - a_new).to(p.dtype))

    # ------------------------------------------------------------ compiled / native trail (opt-in)

    def _kernels(self, group: dict[str, Any], params: list[Tensor], *others: list[Tensor]) -> ModuleType | None:
        """The kernel module of the step: :mod:`.native` (``native=None``, the default, or True; CPU)
        or :mod:`.compiled` (``compiled=True``), where it applies to these tensors; None for the
        reference path. An explicit ``compiled=True`` takes precedence over the default ``native=None``."""
        if group.get("learn_betas") or group["granularity"] != "group" or not params:
            return None
        choice = group.get("native")
        wanted = bool(choice) or (choice is None and not group.get("compiled"))
        if wanted and not torch.compiler.is_compiling() and native.applies(params, *others):  # inductor: reference ops
            return native
        if group.get("compiled") and _compiled_tensors(params) and compiled.available():
            return compiled
        return None

    def trail_dot(
        self, group: dict[str, Any], params: list[Tensor], grads: list[Tensor], trails: list[Tensor]
    ) -> Tensor | None:
        """``Σ <g_s, E>`` over the group in one read pass of the kernel, or None where none applies."""
        kernels = self._kernels(group, params, grads, trails)
        if kernels is None:
            return None
        dot = native.trail_dot if kernels is native else compiled.two_pass_dot
        return dot(
            grads,
            trails,
            params=params,
            weight_decay=group["weight_decay"],
            decoupled=self.decoupled,
            maximize=group["maximize"],
        )

    def pass_takes_dot(self, group: dict[str, Any], params: list[Tensor], grads: list[Tensor]) -> bool:
        """Whether the update pass takes the dot product on the way (the native kernel applies)."""
        return self._kernels(group, params, grads) is native

    def update_with_trail(
        self,
        group: dict[str, Any],
        params: list[Tensor],
        grads: list[Tensor],
        states: list[dict[str, Any]],
        trails: list[Tensor],
        a0: Tensor,
        weight: float,
        with_dot: bool = False,
    ) -> tuple[bool, Tensor | None]:
        """The Adam step with step size ``a0`` and ``E <- (1 - weight) E + weight a0 d`` in one kernel pass.

        Returns ``(False, None)`` (and changes nothing but the lazily created moments) where no
        kernel applies; the engine then takes the default update plus the trail's passes. With
        ``with_dot``, the second value is ``Σ <g~, E>`` of the trails before the update (the
        native pass takes it on the way; the compiled kernels in a read pass first).
        """
        for p, st in zip(params, states, strict=True):
            _init(p, st)
        moments = [st["exp_avg"] for st in states], [st["exp_avg_sq"] for st in states]
        kernels = self._kernels(group, params, grads, *moments, trails)
        if kernels is None:
            return False, None
        beta1, beta2 = group["betas"]
        steps = [st["step"] for st in states]
        h = None
        if kernels is native:  # the kernel advances the counts itself (no per-tensor Python work)
            extra: dict[str, bool] = {"increment_steps": True, "with_dot": with_dot}
        else:
            if with_dot:
                h = self.trail_dot(group, params, grads, trails)
            torch._foreach_add_(steps, 1)
            extra = {}
        kept = kernels.adam_trail_update(
            params,
            grads,
            *moments,
            trails,
            steps,
            a0,
            beta1,
            beta2,
            group["eps"],
            group["weight_decay"],
            self.decoupled,
            group["maximize"],
            weight,
            **extra,
        )
        return True, kept if kernels is native else h


def _compiled_tensors(params: list[Tensor]) -> bool:
    """float32 tensors on one CPU or CUDA device (what the compiled kernels take)."""
    return all(p.dtype == torch.float32 and p.device.type in ("cpu", "cuda") for p in params) and (
        len({p.device for p in params}) == 1
    )


def _keep_tangents(
    st: dict[str, Any], g: Tensor, m_old: Tensor, v_old: Tensor, denom: Tensor, beta1: Beta, beta2: Beta
) -> None:
    """Store ``∂d_s/∂β1`` and ``∂d_s/∂β2`` (closed forms in :class:`AdamRule`'s docstring)."""
    t = st["step"].double()
    bc1, bc2 = 1 - beta1**t, 1 - beta2**t
    m, v = st["exp_avg"], st["exp_avg_sq"]
    dm = (m_old - g) / bc1 + m * (t * beta1 ** (t - 1) / bc1**2)
    v_hat = v / bc2
    dv = (v_old - g * g) / bc2 + v * (t * beta2 ** (t - 1) / bc2**2)
    sqrt_v = v_hat.sqrt()
    # At t = 1 the bias corrections make d_1 = g / (|g| + eps) whatever the betas: both
    # tangents are exactly 0, and the closed forms leave only rounding noise (~1e-18),
    # whose sign a normalized level would turn into a full-size move.
    first = t <= 1
    t1 = torch.where(first, torch.zeros_like(v), dm / denom)
    t2 = torch.where(first | (sqrt_v <= 0), torch.zeros_like(v), -(m / bc1) / denom**2 * dv / (2 * sqrt_v))
    keep(st, "beta1_tangent", t1, g.dtype)
    keep(st, "beta2_tangent", t2, g.dtype)
