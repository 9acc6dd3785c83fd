"""SGD (with momentum, dampening, Nesterov and weight decay) as level 0 of a tower."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import torch
from torch import Tensor
from torch.optim.sgd import sgd as torch_sgd

from . import chunks, fused, masking, native
from .buffers import keep
from .grad import loss_grad
from .protocol import Probe

__all__ = ["SGDRule"]

#: 16-bit floats: torch 2.13's CPU fused SGD kernel leaves almost all of them unchanged.
_SIXTEEN_BIT = (torch.float16, torch.bfloat16)


def _grad(group: dict[str, Any], p: Tensor, grad: Tensor) -> Tensor:
    return loss_grad(grad, p, maximize=group["maximize"], l2=group["weight_decay"])


def _momentum(group: dict[str, Any], learned: Tensor | None) -> float | Tensor:
    """μ in use: the learned one (a float64 tensor) with ``learn_momentum``, else the group's."""
    return learned[0] if learned is not None and group.get("learn_momentum") else group["momentum"]


class SGDRule:
    """Level 0 of :class:`~stepsize_tower.TowerSGD`: ``d_s = g_s``, ``buf_s``, or ``g_s + μ buf_s`` (Nesterov).

    ``buf_s = μ buf_{s-1} + (1 - τ) g_s`` (``buf_1 = g_1``). The previous direction is the
    momentum buffer itself for heavy ball; plain SGD and Nesterov keep the previous
    gradient (``prev_grad``, one parameter-sized buffer) once a tower is on top. With
    ``learn_momentum`` the tangent ``T_s = ∂d_s/∂μ`` (``buf_{s-1}``, or ``buf_s + μ buf_{s-1}``
    for Nesterov) is kept as ``momentum_tangent``.
    """

    normalized = False

    def learned_initial(self, group: dict[str, Any]) -> list[float]:
        return [group["momentum"]] if group.get("learn_momentum") else []

    def loss_grad(self, group: dict[str, Any], p: Tensor, grad: Tensor) -> Tensor:
        return _grad(group, p, grad)

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
        mu, damp = _momentum(group, learned), group["dampening"]
        g = chunks.flat(_grad(group, p, grad))
        zero = torch.zeros((), dtype=torch.float64, device=p.device)
        gg = chunks.dot(g, g) if slope else zero  # only the slope <g_s, d_{0,s}> needs it
        buf, prev = state.get("momentum_buffer"), state.get("prev_grad")
        g_buf = chunks.dot(g, chunks.flat(buf)) if buf is not None else None
        g_prev = chunks.dot(g, chunks.flat(prev)) if prev is not None else None
        tangent = state.get("momentum_tangent")
        tangent_dots = (
            [chunks.dot(g, chunks.flat(tangent)) if tangent is not None else zero]
            if group.get("learn_momentum")
            else []
        )
        if group["momentum"] == 0:
            return Probe(g_prev if g_prev is not None else zero, gg, tangent_dots)
        if not group["nesterov"]:
            dot_prev = g_buf if g_buf is not None else zero
        else:
            dot_prev = zero if (g_prev is None or g_buf is None) else g_prev + mu * g_buf
        if not slope:
            return Probe(dot_prev, zero, tangent_dots)
        buf_new = gg if g_buf is None else mu * g_buf + (1 - damp) * gg  # <g, buf_s>
        return Probe(dot_prev, gg + mu * buf_new if group["nesterov"] else buf_new, tangent_dots)

    def native_probe(
        self, group: dict[str, Any], params: list[Tensor], grads: list[Tensor], states: list[dict[str, Any]]
    ) -> tuple[Tensor, Tensor] | None:
        """``(Σ <g̃_s, buf>, max |g_s|)`` over the group in one read pass of the native CPU kernel
        (heavy ball, every buffer present), or None where it does not apply."""
        if group["momentum"] == 0 or group["nesterov"]:
            return None
        bufs = _present(states, "momentum_buffer")
        if bufs is None or not _native_applies(group, params, grads, bufs):
            return None
        return native.dot_and_max(
            grads, bufs, params=params, weight_decay=group["weight_decay"], maximize=group["maximize"]
        )

    def trail_dot(
        self, group: dict[str, Any], params: list[Tensor], grads: list[Tensor], trails: list[Tensor]
    ) -> Tensor | None:
        """``Σ <g̃_s, E>`` over the group in one read pass of the native kernel, or None where it does not apply."""
        if not _native_applies(group, params, grads, trails):
            return None
        return native.trail_dot(
            grads,
            trails,
            params=params,
            weight_decay=group["weight_decay"],
            decoupled=False,
            maximize=group["maximize"],
        )

    def trail_probe(
        self, group: dict[str, Any], params: list[Tensor], grads: list[Tensor], trails: list[Tensor]
    ) -> tuple[Tensor, Tensor] | None:
        """``(Σ <g̃_s, E>, max |g_s|)``: the trail hypergradient and the blow-up guard's measure in one
        read pass of the native kernel, or None where it does not apply."""
        if not _native_applies(group, params, grads, trails):
            return None
        return native.dot_and_max(
            grads, trails, params=params, weight_decay=group["weight_decay"], maximize=group["maximize"]
        )

    def pass_takes_dot(self, group: dict[str, Any], params: list[Tensor], grads: list[Tensor]) -> bool:
        """Whether the update pass takes the dot product on the way (the native kernel applies)."""
        return _native_applies(group, params, grads)

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
        """The SGD step with step size ``a0`` and ``E <- (1 - weight) E + weight a0 d`` in one native pass.

        With ``with_dot`` it also returns ``Σ <g~, E>`` of the trails before the update, taken
        in the same pass. Returns ``(False, None)``, changing nothing, where it does not apply
        (the first step, which creates the momentum buffers or the kept gradients; learned
        momentum; tensors outside the kernel's scope): the engine then takes the default update
        plus the trail's passes.
        """
        momentum, nesterov = group["momentum"], group["nesterov"]
        bufs = _present(states, "momentum_buffer") if momentum != 0 else []
        kept = _present(states, "prev_grad") if momentum == 0 or nesterov else []
        if bufs is None or kept is None:
            return False, None
        others = [lst for lst in (bufs, kept) if lst]
        if not _native_applies(group, params, grads, trails, *others):
            return False, None
        h = native.sgd_trail_update(
            params, grads, bufs, trails, kept, a0, momentum, group["dampening"], group["weight_decay"],
            nesterov, group["maximize"], weight, with_dot,
        )  # fmt: skip
        return True, h

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
        keep_grad = bool(group["levels"]) and (group["momentum"] == 0 or group["nesterov"])
        learn = bool(group.get("learn_momentum"))
        if not learn and _fused_update(group, params, grads, states, step_sizes, keep_grad, skip):
            return

        def one(i: int) -> None:
            p, state = params[i], states[i]
            g = _grad(group, p, grads[i])
            if keep_grad:  # plain SGD and Nesterov rebuild the previous direction from g_{s-1}
                keep(state, "prev_grad", g)
            d = g if group["momentum"] == 0 else _momentum_direction(group, _momentum(group, learned), g, state, learn)
            _move(p, d, step_sizes[i])

        masking.per_tensor(skip, params, states, one)

    def torch_update(
        self, group: dict[str, Any], params: list[Tensor], grads: list[Tensor], states: list[dict[str, Any]]
    ) -> None:
        """``torch.optim.SGD``'s functional update (its default path unless ``fused`` applies)."""
        momentum = group["momentum"]
        bufs: list[Tensor | None] = [st.get("momentum_buffer") if momentum != 0 else None for st in states]
        companions = [(g,) if b is None else (g, b) for g, b in zip(grads, bufs, strict=True)]
        same_start = all(b is None for b in bufs) or all(b is not None for b in bufs)
        use_fused = group.get("fused") is True and same_start and fused.fused_applies(group, params, companions)
        torch_sgd(
            params,
            grads,
            bufs,
            fused=True if use_fused else None,
            weight_decay=group["weight_decay"],
            momentum=momentum,
            lr=group["lr"],
            dampening=group["dampening"],
            nesterov=group["nesterov"],
            maximize=group["maximize"],
        )
        if momentum != 0:
            for st, buf in zip(states, bufs, strict=True):
                st["momentum_buffer"] = buf

    def retreat(
        self,
        group: dict[str, Any],
        learned: Tensor | None,
        p: Tensor,
        state: dict[str, Any],
        a_prev: Tensor,
        a_new: Tensor,
    ) -> None:
        mu = _momentum(group, learned)
        if group["momentum"] == 0:
            d = state["prev_grad"]
        elif group["nesterov"]:
            d = state["prev_grad"] + mu * state["momentum_buffer"]
        else:
            d = state["momentum_buffer"]
        p.add_(d * (a_prev - a_new).to(d.dtype))


def _present(states: list[dict[str, Any]], key: str) -> list[Tensor] | None:
    """Every tensor's ``state[key]``, or None when one of them has none yet."""
    found = [st.get(key) for st in states]
    return None if any(t is None for t in found) else [t for t in found if t is not None]


def _native_applies(group: dict[str, Any], params: list[Tensor], grads: list[Tensor], *others: list[Tensor]) -> bool:
    """Whether the native kernels take this group's passes: not switched off, not compiling,
    momentum not learned, one step size for the group, dense float32/float64 CPU tensors
    (:func:`native.applies`)."""
    if group.get("native") is False or group.get("learn_momentum") or group["granularity"] != "group" or not params:
        return False
    if torch.compiler.is_compiling():
        return False
    return native.applies(params, grads, *others)


def _momentum_direction(
    group: dict[str, Any], mu: float | Tensor, g: Tensor, state: dict[str, Any], learn: bool
) -> Tensor:
    """Advance the momentum buffer (and the tangent ``∂d/∂μ`` with ``learn``); return ``buf_s`` or ``g + μ buf_s``."""
    buf = state.get("momentum_buffer")
    if buf is None:
        buf = state["momentum_buffer"] = g.detach().clone()
        if learn:
            keep(state, "momentum_tangent", torch.zeros_like(g))
    else:
        if learn:
            keep(state, "momentum_tangent", buf)  # ∂buf_s/∂μ = buf_{s-1}
        buf.mul_(mu).add_(g, alpha=1 - group["dampening"])
    if not group["nesterov"]:
        return buf
    if learn:  # ∂(g + μ buf_s)/∂μ = buf_s + μ buf_{s-1}
        state["momentum_tangent"].mul_(mu).add_(buf)
    return g + mu * buf


def _fused_update(
    group: dict[str, Any],
    params: list[Tensor],
    grads: list[Tensor],
    states: list[dict[str, Any]],
    step_sizes: Sequence[Tensor | float],
    keep_grad: bool,
    skip: Tensor | None = None,
) -> bool:
    """torch's fused SGD kernel, one call per distinct step size; False where it does not apply.

    It applies when ``fused`` is not False, the parameters share one CPU/CUDA float dtype and
    device, are laid out like their gradients and buffers, and the momentum buffers are all
    present or all absent (the kernel's first step initializes them all, as
    ``torch.optim.SGD`` does).
    """
    companions = [
        (g, st["momentum_buffer"]) if "momentum_buffer" in st else (g,) for g, st in zip(grads, states, strict=True)
    ]
    if not fused.fused_applies(group, params, companions):
        return False
    if any(p.device.type == "cpu" and p.dtype in _SIXTEEN_BIT for p in params):
        return False  # torch 2.13's CPU kernel leaves 99-100 % of 16-bit weights unchanged (measured)
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
            g = _grad(group, p, grad)
            if skip is not None and "prev_grad" in st:  # a skipped step keeps the last gradient
                g = torch.where(skip, st["prev_grad"], g)
            keep(st, "prev_grad", g)
    for lr, idx in fused.by_step_size(step_sizes):
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
            **masking.found_inf(skip),
        )
    return True


def _move(p: Tensor, d: Tensor, a: Tensor | float) -> None:
    """``p <- p - a d`` for a Python or tensor step size, without a host sync."""
    if isinstance(a, Tensor):
        p.sub_(d * a.to(d.dtype))
    else:
        p.add_(d, alpha=-a)
