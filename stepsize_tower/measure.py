"""Measure: the dot products, the largest gradient entry and the finiteness test of one step (reads only)."""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass, replace
from typing import Any

import torch
from torch import Tensor

from . import distributed, trail
from .bases import BaseRule, has_native_probe, has_trail_kernels, has_trail_probe, native
from .lag import LAG_KEY
from .plan import Batch, Plan

__all__ = ["Measurement", "complete_across_ranks", "grads_finite", "measure", "trail_dot_of"]


@dataclass(frozen=True)
class Measurement:
    """Per unit (shape [U]) unless noted; partial sums over this rank's tensors until completed."""

    #: ``<g_s, d_{0,s-1}>`` (zeros unless the plan is exact or hyperparameters are learned).
    prev_dot: Tensor
    #: ``<g_s, d_{0,s}>``, the direction this step would take (zeros unless a test needs it).
    slope: Tensor
    #: ``<g_s, E>`` against the trail (``horizon > 0`` with levels), else None.
    trail_dot: Tensor | None
    #: ``<g_s, T_j>`` [H] for the learned hyperparameters, else None.
    tangent_dots: Tensor | None
    #: The largest absolute gradient entry (SGD's blow-up guard; the first two steps), else None.
    gmax: Tensor | None
    #: ``||g_s||^2`` over the group (the first two steps: clipping detection), else None.
    grad_norm_sq: Tensor | None
    #: Whether the gradients are finite, where no dot product above has seen them.
    finite: Tensor
    #: Lagged, where no update pass takes it: ``<g_s, E>`` per unit, measured here for the next
    #: step (it also tells the finiteness; :mod:`stepsize_tower.lag`), else None.
    pending: Tensor | None = None


def _per_unit(plan: Plan, values: Iterable[Tensor], device: torch.device) -> Tensor:
    """Sum per-tensor values (float32 or float64; summed in float64) into the units."""
    listed = list(values)
    if not listed:
        return torch.zeros(plan.units, dtype=torch.float64, device=device)
    if plan.unit_index is None:  # one unit: the group
        return torch.stack(listed).double().sum().reshape(1)
    out = torch.zeros(plan.units, dtype=torch.float64, device=plan.unit_index.device)
    return out.index_add_(0, plan.unit_index, torch.stack(listed).double())


def measure(rule: BaseRule, group: dict[str, Any], ts: dict[str, Tensor], plan: Plan, batch: Batch) -> Measurement:
    """Everything the decisions and the levels need from this step's gradients."""
    device = ts["step"].device
    prev_dot = slope = torch.zeros(plan.units, dtype=torch.float64, device=device)
    tangent_dots = None
    fast = _native_probe(rule, group, plan, batch)
    if fast is not None:
        prev_dot = fast[0].reshape(1).to(device)
    elif plan.exact or plan.learns_hyperparams:
        learned = ts.get("hyper_value")
        probes = [
            rule.probe(
                group, learned, p, g, st, plan.a_prev[u], exact=plan.exact, slope=plan.startup_test or plan.searching
            )
            for p, g, st, u in zip(batch.params, batch.grads, batch.states, plan.unit_of, strict=True)
        ]
        prev_dot = _per_unit(plan, (pr.prev_dot for pr in probes), device)
        slope = _per_unit(plan, (pr.slope for pr in probes), device)
        if plan.learns_hyperparams:
            tangent_dots = (
                torch.stack([torch.stack(pr.tangent_dots) for pr in probes]).double().sum(dim=0)
                if probes
                else torch.zeros_like(ts["hyper_value"])
            )
    trail_dot = gmax = pending = None
    if plan.lagged:  # kept from the last taken step (stepsize_tower.lag)
        trail_dot = ts[LAG_KEY].clone()
        gmax = _largest(group, batch.grads) if plan.blowup_guard else None
        if not _pass_takes_dot(rule, group, plan, batch):  # this step's value: read now, kept after the step
            pending = trail_dot_of(rule, group, plan, batch, device)
    elif plan.horizon > 0 and plan.levels:
        probed = _trail_probe(rule, group, plan, batch) if plan.blowup_guard or plan.clip_check else None
        if probed is not None:
            trail_dot, gmax = probed[0].reshape(1).to(device), probed[1].to(device)
        else:
            trail_dot = trail_dot_of(rule, group, plan, batch, device)
    if (plan.blowup_guard or plan.clip_check) and gmax is None:
        gmax = fast[1].to(device) if fast is not None else _grad_max(batch.grads)
    norm_sq = _grad_norm_sq(batch.grads, device) if plan.clip_check else None
    # Every dot product contains a gradient, and inf * 0 = nan: a non-finite gradient shows in
    # them, except on a step where no dot product saw the gradient (no trail yet).
    finite = torch.isfinite(gmax) if gmax is not None else torch.ones((), dtype=torch.bool, device=device)
    if pending is not None:
        finite = finite & torch.isfinite(pending).all()
    elif not (plan.exact or plan.learns_hyperparams) and (plan.lagged or not trail.has_trail(batch.states)):
        if gmax is None:  # the lagged hypergradient holds no gradient of this step
            finite = finite & _grads_finite(group, batch.grads)
    return Measurement(prev_dot, slope, trail_dot, tangent_dots, gmax, norm_sq, finite, pending)


def _pass_takes_dot(rule: BaseRule, group: dict[str, Any], plan: Plan, batch: Batch) -> bool:
    """Whether this step's update pass will take the lagged dot product (one unit, read path,
    the base's one-pass kernel applies); elsewhere measure reads it before the step."""
    if plan.unit_index is not None or plan.masked or isinstance(plan.trail_weight, Tensor) or not batch.params:
        return False
    return has_trail_kernels(rule) and rule.pass_takes_dot(group, batch.params, batch.grads)


def _native_probe(rule: BaseRule, group: dict[str, Any], plan: Plan, batch: Batch) -> tuple[Tensor, Tensor] | None:
    """The base's one-pass ``(<g_s, d_{0,s-1}>, max |g_s|)`` where only these are needed (one unit,
    no slope, no learned hyperparameters, no trail), else None."""
    if not plan.exact or plan.learns_hyperparams or plan.unit_index is not None or plan.sharded:
        return None
    if plan.startup_test or plan.searching or (plan.horizon > 0 and plan.levels) or not has_native_probe(rule):
        return None
    return rule.native_probe(group, batch.params, batch.grads, batch.states)


def _trail_probe(rule: BaseRule, group: dict[str, Any], plan: Plan, batch: Batch) -> tuple[Tensor, Tensor] | None:
    """The base's one-pass ``(<g_s, E>, max |g_s|)`` against the trail (one unit, every trail
    present, not sharded), else None."""
    if plan.unit_index is not None or plan.sharded or not has_trail_probe(rule):
        return None
    if not batch.params or not trail.has_trail(batch.states):
        return None
    return rule.trail_probe(group, batch.params, batch.grads, [st[trail.TRAIL_KEY] for st in batch.states])


def trail_dot_of(rule: BaseRule, group: dict[str, Any], plan: Plan, batch: Batch, device: torch.device) -> Tensor:
    """``<g_s, D_{s-1}>`` per unit, kept as its moving average ``E = (1 - γ) D``: from the base's
    compiled read pass where it has one (one step size for the group), else tensor by tensor."""
    if has_trail_kernels(rule) and batch.params and trail.has_trail(batch.states):
        trails = [st[trail.TRAIL_KEY] for st in batch.states]
        fast = rule.trail_dot(group, batch.params, batch.grads, trails)
        if fast is not None:
            return fast.reshape(1).to(device)
    zero = torch.zeros((), dtype=torch.float64, device=device)

    def loss_grad(p: Tensor, g: Tensor) -> Tensor:
        return rule.loss_grad(group, p, g)

    # Each product in the tensors' precision, summed in float64 by _per_unit (one cast).
    return _per_unit(plan, trail.dots(loss_grad, batch.params, batch.grads, batch.states, zero), device)


def complete_across_ranks(
    m: Measurement, group: dict[str, Any], count: int, trail_complete: bool = False
) -> tuple[Measurement, Tensor]:
    """The sums over every rank of a sharded group (one collective), and whether any rank had
    a gradient (a 0-dim bool tensor, not read: where it is False the step changes nothing).
    ``trail_complete``: ``trail_dot`` is already the sum (the lagged value, :mod:`stepsize_tower.lag`)."""
    sums = [m.prev_dot, m.slope, None if trail_complete else m.trail_dot, m.tangent_dots, m.grad_norm_sq]
    any_grad, finite, reduced, gmax = distributed.reduce_across_ranks(
        count, m.finite, sums, m.gmax, distributed.shard_group(group["params"])
    )
    prev_dot, slope = reduced[0], reduced[1]
    assert prev_dot is not None and slope is not None
    completed = replace(
        m,
        prev_dot=prev_dot,
        slope=slope,
        trail_dot=m.trail_dot if trail_complete else reduced[2],
        tangent_dots=reduced[3],
        grad_norm_sq=reduced[4],
        gmax=gmax,
        finite=finite,
    )
    return completed, any_grad


def _grad_max(grads: list[Tensor]) -> Tensor:
    """The largest absolute gradient entry (float64); inf or nan if any entry is. Never overflows.

    One ``aminmax`` pass per tensor (the max-abs norm kernel is ~15x slower on CPU).
    """
    extremes = [torch.stack(torch.aminmax(g)) for g in grads if g.numel()]
    if not extremes:  # no entries (or, on a rank holding none of a sharded group, no tensors)
        return torch.zeros((), dtype=torch.float64, device=grads[0].device if grads else None)
    return torch.stack(extremes).abs().max().double()


def _grad_norm_sq(grads: list[Tensor], device: torch.device) -> Tensor:
    """``||g||^2`` over all the gradients (float64, summed over tensors)."""
    if not grads:
        return torch.zeros((), dtype=torch.float64, device=device)
    norms = torch.stack([torch.linalg.vector_norm(g, dtype=torch.float64) for g in grads])
    return norms.square().sum().to(device)


def _native_reads(group: dict[str, Any], grads: list[Tensor]) -> bool:
    """Whether the native kernels read these gradients (CPU, dense, one float dtype; not turned
    off; not while ``torch.compile`` traces the step, which takes the reference ops)."""
    return group.get("native") is not False and not torch.compiler.is_compiling() and native.applies(grads)


def _largest(group: dict[str, Any], grads: list[Tensor]) -> Tensor:
    """The largest absolute gradient entry (float64): one native read pass where it applies."""
    return native.largest(grads) if _native_reads(group, grads) else _grad_max(grads)


def _grads_finite(group: dict[str, Any], grads: list[Tensor]) -> Tensor:
    """Whether every gradient is finite: one native read pass where it applies."""
    if _native_reads(group, grads):
        return torch.tensor(native.all_finite(grads))
    return grads_finite(grads)


def grads_finite(grads: list[Tensor]) -> Tensor:
    """Whether every gradient is finite."""
    return torch.isfinite(_grad_max(grads))
