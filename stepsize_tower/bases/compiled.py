r"""Compiled (torch.compile / inductor) kernels for the Adam update with the trail of updates.

:func:`two_pass_dot` and :func:`adam_trail_update` are the step of ``TowerAdam(compiled=True)``
(:meth:`stepsize_tower.bases.adam.AdamRule.trail_dot` / ``update_with_trail``). Every function
runs the same code eagerly when :func:`available` is False (no inductor, no C++ compiler);
the optimizer then takes its default path instead.

Notation, per parameter tensor (float32): weights :math:`w`, gradient :math:`g`, Adam moments
:math:`m, v`, trail :math:`E` (moving average of recent updates, weight :math:`\omega = 1-\gamma`),
step count :math:`t` (already incremented by the caller, as for ``torch._fused_adam_``), step
size :math:`a` (a 0-dim float64 tensor), weight decay :math:`\lambda`:

.. math::
    \begin{aligned}
    &\tilde g = \pm g \;(+\,\lambda w \text{ for L2 decay, Adam}), \qquad
     m' = \beta_1 m + (1-\beta_1)\tilde g, \qquad v' = \beta_2 v + (1-\beta_2)\tilde g^2 \\
    &u = \frac{m'}{\sqrt{v'}/\sqrt{1-\beta_2^t} + \epsilon}, \qquad
     \Delta = \frac{a}{1-\beta_1^t}\,u \;(+\,a\lambda w \text{ for decoupled decay, AdamW}) \\
    &w' = w - \Delta \;(\text{AdamW: } w' = w(1-a\lambda) - \tfrac{a}{1-\beta_1^t} u), \qquad
     E' = (1-\omega) E + \omega \Delta \\
    &h = \sum_{\text{tensors}} \langle \tilde g, E \rangle \quad\text{(float64, exact float32 products)}
    \end{aligned}

``Δ`` is the intended update :math:`a\,d` in float32, not ``w - w'`` (which would carry the
rounding of :math:`w'`, about ``ulp(w)``, into the trail).

The dot product against the old trail comes first (it decides :math:`a`), then ONE fused
loop reads :math:`w, g, m, v, E` once and writes :math:`w, m, v, E` once. Memory traffic
bounds it: fused Adam moves 28 bytes per parameter, this order 44 (1.57x). The variants
measured against it are in ``experiments/README.md``.

Compilation is per list of tensor shapes (``dynamic=False``, ``fullgraph=True``): the first
call for a parameter list compiles (seconds to tens of seconds), later calls with new values of
``a``, ``steps`` or the tensors' contents do not recompile (they are tensors, not Python
floats). A change of a Python-float hyperparameter (betas, eps, weight decay, trail weight)
recompiles once, then dynamo treats it as dynamic.
"""

from __future__ import annotations

import logging
import os
from collections.abc import Callable, Sequence
from typing import Any

import torch
from torch import Tensor

from .adam_math import adam_direction
from .grad import loss_grad

__all__ = [
    "ENV_SWITCH",
    "adam_trail_update",
    "adam_trail_values",
    "available",
    "reset",
    "two_pass_dot",
]

#: Environment variable: set to "0" to never compile (``compiled=True`` then takes the default path).
ENV_SWITCH = "STEPSIZE_TOWER_COMPILE"

_log = logging.getLogger(__name__)

_available: bool | None = None
_compiled: dict[str, Callable[..., Any]] = {}


# --------------------------------------------------------------------------- availability


def _probe(x: Tensor, y: Tensor) -> Tensor:
    z = x * 2.0 + y
    y.copy_(z)
    return (x.double() * z.double()).sum()


def available() -> bool:
    """Whether torch.compile (inductor, with a working C++ compiler) can run these kernels.

    Decided once per process by compiling and running a tiny kernel; any failure (no
    inductor, no compiler, an unsupported Python) gives False, and so does
    ``STEPSIZE_TOWER_COMPILE=0`` (:data:`ENV_SWITCH`).
    """
    global _available
    if os.environ.get(ENV_SWITCH, "1") == "0":
        return False
    if _available is None:
        _available = _probe_once()
    return _available


def _probe_once() -> bool:
    try:
        fn = torch.compile(_probe, dynamic=False, fullgraph=True)
        x = torch.arange(32, dtype=torch.float32)
        y = torch.ones(32)
        got = fn(x, y)
        want = (x.double() * (x * 2.0 + 1.0).double()).sum()
        return bool(torch.allclose(got, want)) and bool(torch.equal(y, x * 2.0 + 1.0))
    except Exception as exc:  # any failure of the compiler stack means: run eagerly
        _log.info("stepsize_tower: torch.compile unavailable (%s: %s); using eager kernels", type(exc).__name__, exc)
        return False


def reset() -> None:
    """Forget the availability decision and the compiled functions (for tests)."""
    global _available
    _available = None
    _compiled.clear()


def _run(name: str, fn: Callable[..., Any], *args: Any, **kwargs: Any) -> Any:
    """``fn`` compiled when :func:`available`, else eager; a compile failure falls back once and for all."""
    global _available
    if not available():
        return fn(*args, **kwargs)
    compiled = _compiled.get(name)
    if compiled is None:
        compiled = _compiled[name] = torch.compile(fn, dynamic=False, fullgraph=True)
    try:
        return compiled(*args, **kwargs)
    except Exception as exc:  # compilation happens before any tensor is written
        _log.warning("stepsize_tower: compiling %s failed (%s: %s); using eager kernels", name, type(exc).__name__, exc)
        _available = False
        return fn(*args, **kwargs)


def _as_step_size(a: Tensor | float, like: Tensor) -> Tensor:
    if isinstance(a, Tensor):
        return a.detach().to(dtype=torch.float64, device=like.device).reshape(())
    return torch.tensor(float(a), dtype=torch.float64, device=like.device)


def _check(params: Sequence[Tensor], *lists: Sequence[Tensor]) -> None:
    for seq in lists:
        if len(seq) != len(params):
            raise ValueError("all tensor lists must have the same length")
    for p in params:
        if p.dtype != torch.float32:
            raise TypeError(f"the compiled kernels take float32 tensors, got {p.dtype}")


# --------------------------------------------------------------------------- shared math


def _loss_grad(p: Tensor, g: Tensor, weight_decay: float, decoupled: bool, maximize: bool) -> Tensor:
    return loss_grad(g, p, maximize=maximize, l2=0.0 if decoupled else weight_decay)


def _adam_scalars(
    steps: list[Tensor], a: Tensor, beta1: float, beta2: float, weight_decay: float, decoupled: bool
) -> Tensor:
    """Per tensor ``[a / (1-β1^t), sqrt(1-β2^t), a λ (AdamW, else 0)]`` (float64 math, float32 out), ``[N, 3]``.

    The compiled bodies return it as an output so that inductor stores it once before the
    loops; otherwise it inlines these scalars (``pow`` in float64) into every vector iteration,
    which costs more than the loops' memory traffic (2 ms instead of 0.65 ms per 1M
    parameters, measured).
    """
    t = torch.stack([s.reshape(()) for s in steps]).to(device=a.device, dtype=torch.float64)
    decay = a * weight_decay if decoupled and weight_decay != 0 else torch.zeros_like(a)
    return torch.stack([a / (1 - beta1**t), (1 - beta2**t).sqrt(), decay.expand_as(t)], dim=1).float()


def _adam_new(
    p: Tensor,
    gt: Tensor,
    m: Tensor,
    v: Tensor,
    coef: Tensor,
    beta1: float,
    beta2: float,
    eps: float,
    weight_decay: float,
    decoupled: bool,
) -> tuple[Tensor, Tensor, Tensor, Tensor]:
    """``(w', m', v', Δ)`` in torch.optim.Adam's order of operations; ``coef`` a row of :func:`_adam_scalars`."""
    step_size, bc2_sqrt, decay = coef[0], coef[1], coef[2]
    m_new = m.lerp(gt, 1 - beta1)
    v_new = v * beta2 + (1 - beta2) * gt * gt
    u = step_size * adam_direction(m_new, v_new, bc2_sqrt, eps)
    if decoupled and weight_decay != 0:
        return p * (1 - decay) - u, m_new, v_new, u + decay * p
    return p - u, m_new, v_new, u


def adam_trail_values(
    p: Tensor,
    g: Tensor,
    m: Tensor,
    v: Tensor,
    e: Tensor,
    coef: Tensor,
    beta1: float,
    beta2: float,
    eps: float,
    weight_decay: float,
    decoupled: bool,
    maximize: bool,
    trail_weight: float,
) -> tuple[Tensor, Tensor, Tensor, Tensor, Tensor]:
    """``(g̃, w', m', v', E')`` of one tensor for one step (computed, not written; traced inside the kernels)."""
    gt = _loss_grad(p, g, weight_decay, decoupled, maximize)
    w_new, m_new, v_new, delta = _adam_new(p, gt, m, v, coef, beta1, beta2, eps, weight_decay, decoupled)
    return gt, w_new, m_new, v_new, e * (1 - trail_weight) + trail_weight * delta


def _dot64(x: Tensor, y: Tensor) -> Tensor:
    """``<x, y>`` with exact float32 products accumulated in float64."""
    return (x.to(torch.float64) * y.to(torch.float64)).sum()


# --------------------------------------------------------------------------- kernels (eager bodies)


def _dot_body(
    params: list[Tensor],
    grads: list[Tensor],
    trails: list[Tensor],
    weight_decay: float,
    decoupled: bool,
    maximize: bool,
) -> Tensor:
    total = torch.zeros((), dtype=torch.float64, device=grads[0].device)
    for p, g, e in zip(params, grads, trails, strict=True):
        total = total + _dot64(_loss_grad(p, g, weight_decay, decoupled, maximize).reshape(-1), e.reshape(-1))
    return total


def _update_body(
    params: list[Tensor],
    grads: list[Tensor],
    exp_avgs: list[Tensor],
    exp_avg_sqs: list[Tensor],
    trails: list[Tensor],
    steps: list[Tensor],
    a: Tensor,
    beta1: float,
    beta2: float,
    eps: float,
    weight_decay: float,
    decoupled: bool,
    maximize: bool,
    trail_weight: float,
) -> Tensor:
    coefs = _adam_scalars(steps, a, beta1, beta2, weight_decay, decoupled)
    for i, (p, g, m, v, e) in enumerate(zip(params, grads, exp_avgs, exp_avg_sqs, trails, strict=True)):
        _, w_new, m_new, v_new, e_new = adam_trail_values(
            p, g, m, v, e, coefs[i], beta1, beta2, eps, weight_decay, decoupled, maximize, trail_weight
        )
        p.copy_(w_new)
        m.copy_(m_new)
        v.copy_(v_new)
        e.copy_(e_new)
    return coefs  # an output, so stored once (see _adam_scalars)


# --------------------------------------------------------------------------- public API


def two_pass_dot(
    grads: Sequence[Tensor],
    trails: Sequence[Tensor],
    *,
    params: Sequence[Tensor] | None = None,
    weight_decay: float = 0.0,
    decoupled: bool = True,
    maximize: bool = False,
) -> Tensor:
    r"""``Σ_i <g̃_i, E_i>`` as a 0-dim float64 tensor: one read pass over the gradients and trails.

    ``g̃ = ±g`` (``maximize``), plus ``λ w`` for L2 decay (``decoupled=False`` and
    ``weight_decay != 0``, which needs ``params``). Products are exact (float32 x float32 in
    float64) and accumulated in float64.
    """
    grads, trails = list(grads), list(trails)
    if not grads:
        return torch.zeros((), dtype=torch.float64)
    needs_w = weight_decay != 0 and not decoupled
    if needs_w and params is None:
        raise ValueError("L2 weight decay needs params")
    ps = list(params) if needs_w and params is not None else grads  # unused unless needs_w
    _check(grads, trails, ps)
    return _run(  # type: ignore[no-any-return]
        "dot", _dot_body, ps, grads, trails, float(weight_decay) if needs_w else 0.0, decoupled, maximize
    )


def adam_trail_update(
    params: Sequence[Tensor],
    grads: Sequence[Tensor],
    exp_avgs: Sequence[Tensor],
    exp_avg_sqs: Sequence[Tensor],
    trails: Sequence[Tensor],
    steps: Sequence[Tensor],
    a: Tensor | float,
    beta1: float,
    beta2: float,
    eps: float,
    weight_decay: float,
    decoupled: bool,
    maximize: bool,
    trail_weight: float,
) -> None:
    r"""One Adam/AdamW step with step size ``a`` and the trail update, in one fused loop per tensor.

    In place: :math:`w \leftarrow w'`, :math:`m \leftarrow m'`, :math:`v \leftarrow v'`,
    :math:`E \leftarrow (1-\omega)E + \omega\Delta` with :math:`\omega` = ``trail_weight``
    (``1 - horizon``); see the module docstring for :math:`w', m', v', \Delta`. ``steps`` are
    the per-tensor step counts (0-dim tensors), already incremented for this step; ``a`` is a
    0-dim float64 tensor (a Python float is converted, which costs a small host-to-device copy
    on accelerators). ``decoupled=True`` is AdamW. float32 tensors only.
    """
    params = list(params)
    if not params:
        return
    _check(params, grads, exp_avgs, exp_avg_sqs, trails, steps)
    hyper = (float(beta1), float(beta2), float(eps), float(weight_decay), bool(decoupled), bool(maximize))
    _run(
        "update", _update_body, params, list(grads), list(exp_avgs), list(exp_avg_sqs), list(trails), list(steps),
        _as_step_size(a, params[0]), *hyper, float(trail_weight),
    )  # fmt: skip
