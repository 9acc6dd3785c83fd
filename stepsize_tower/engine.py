"""One step of one parameter group, in the order of the algorithm.

::

    plan       the step's flags, once, from the host's clock (no read)   (plan.make_plan, host_clock)
    measure    <g_s, d_{0,s-1}>, <g_s, d_{0,s}>, <g_s, E>, <g_s, T_j>,
               the largest gradient entry, finiteness (reads only); once
               settled, <g_{s-1}, E> kept by the last update pass in place
               of <g_s, E> (option lagged, the default)                    (measure.measure, lag)
    complete   sum the partial values over the ranks of a sharded group  (measure.complete_across_ranks)
    decide     anything non-finite -> skip: nothing changes, skipped += 1;
               the loss rose (start-up test; under clipping, the direction
               reversed) or the gradient blew up (SGD's blow-up guard)
               -> retreat, retreats += 1          (safeguards.retreat_test / take_back, clipping)
    learn      learned momentum / betas (hyperparams.hyperparam_step), then the levels,
               top-down, with the growth search -> a_{0,s} (levels.tower_step); while a
               schedule anneals lr, level 1 holds back its lowering moves  (schedule_anneal)
               cut by the first-step limit on the first step and on steps
               whose lr rises above its peak (a warm-up)                 (safeguards.limit_first_step)
    apply      w_s = w_{s-1} - a_{0,s} d_{0,s} (the base's update), folded into the trail  (trail);
               lagged: <g_s, E> of the trail before it, kept for the next step       (lag)

Host reads: during the start-up window, one per group and step (the skip/retreat flags, which
also keep the host's clock of the step count, :mod:`stepsize_tower.host_clock`); once settled,
none on accelerators: a skip or SGD's blow-up retreat is a mask on the device
(:func:`_masked_step`; CPU groups keep the one read, :data:`MASK_ON_CPU`), also for sharded
groups (a step no rank had a gradient for is masked too). All learned values stay tensors.
A group with nothing to learn (depth 0, no learned hyperparameters) is the base optimizer
itself, with non-finite steps skipped (:func:`plain_step`): on the CPU ``torch.optim``'s own
update after one read, elsewhere the base's update with the skip as a mask (no read).
"""

from __future__ import annotations

from typing import Any

import torch
from torch import Tensor

from . import clipping, distributed, lag, trail
from .bases import BaseRule, has_trail_kernels
from .clipping import ClipSignal
from .group_state import EFFECTIVE_LR_KEY, TOWER_KEY, new_tower_state, publish_effective_lr
from .host_clock import Clock, clock_of, start_clock
from .hyperparams import hyperparam_step
from .levels import Level, tower_step
from .measure import Measurement, complete_across_ranks, grads_finite, measure, trail_dot_of
from .plan import Batch, Plan, host_lr, lr_tensor, make_plan
from .safeguards import (
    FIRST_MOVE_LIMIT,
    RETREAT_WINDOW,
    Retreat,
    limit_first_step,
    retreat_test,
    take_back,
    typical_scale,
)
from .schedule_anneal import keep_peak, levels_while_annealing
from .search import keeps_searching

__all__ = ["MASK_ON_CPU", "step_group"]

#: Settled steps of CPU groups keep their one read: on the CPU a read stalls no launch queue,
#: while the masks cost passes over memory (measured, 1M parameters, 1 thread: SGD's masked
#: blow-up retreat and trail 1.3-1.5x the step, Adam 1.1-1.25x). Tests turn it on to check
#: the accelerators' path on the CPU.
MASK_ON_CPU = False


def step_group(rule: BaseRule, group: dict[str, Any], state: Any, owner: str) -> None:
    """One optimizer step of ``group``; ``state`` is the optimizer's per-parameter state."""
    sharded = distributed.shards_across_ranks(group)
    batch = _batch(group, state, sharded, owner)
    if batch is None:
        return
    device = batch.params[0].device if batch.params else distributed.local_device(group)
    ts = group.get(TOWER_KEY)
    created = ts is None
    if ts is None:
        ts = group[TOWER_KEY] = new_tower_state(group, rule.learned_initial(group), device)
    if not group["levels"] and "hyper_value" not in ts:
        plain_step(rule, group, state, ts, batch, sharded)
        return
    clock = _clock(group, ts, created)
    plan = make_plan(group, ts, rule, batch, sharded, clock, masks=_masks_on(device))
    if plan.annealing:
        keep_peak(ts, clock)
    m = measure(rule, group, ts, plan, batch)
    any_grad = None
    if sharded:  # partial sums over this rank's parameters: complete them before deciding
        m, any_grad = complete_across_ranks(m, group, len(batch.params), trail_complete=plan.lagged)
    masked = plan.masked
    if any_grad is not None and not masked and not bool(any_grad):
        return  # no rank had a gradient in this group
    update_dot = _update_dot(plan, m)
    finite = _all_finite(m, update_dot)
    clip = _clip_signal(m)
    test = retreat_test(ts, m.prev_dot, m.gmax if plan.blowup_guard else None, plan.startup_test, clip)
    search_dot = keeps_searching(m.prev_dot, ts["prev_slope"]) if plan.searching else None
    if masked:
        _masked_step(rule, group, ts, plan, batch, m, update_dot, finite, test, any_grad)
        clock.raise_peak(host_lr(group))
        return
    skip, retreat = _read_outcome(ts, plan, clock, finite, test, search_dot, host_lr(group))
    if skip:
        ts["skipped"] += 1
        return
    if retreat:
        assert test is not None
        take_back(
            rule, group, ts, batch.params, batch.states, plan.unit_of, plan.a_prev, test.factor, change=test.change
        )
        return
    a0 = learn(rule, group, ts, plan, batch, m, update_dot, search_dot)
    if clip is not None:
        clipping.remember(ts, clip)
    apply(rule, group, ts, plan, batch, a0, pending=m.pending)


def _masked_step(
    rule: BaseRule,
    group: dict[str, Any],
    ts: dict[str, Tensor],
    plan: Plan,
    batch: Batch,
    m: Measurement,
    update_dot: Tensor,
    finite: Tensor,
    test: Retreat | None,
    any_grad: Tensor | None = None,
) -> None:
    """A settled step (after the start-up window) with no host read: the skip and SGD's
    blow-up retreat are masks on the device, and every update is taken or undone by them.
    Where nothing fires the result is bitwise the unmasked step's. ``any_grad`` (sharded
    groups): False where no rank had a gradient, a step that changes and counts nothing."""
    keep = _count_skip(ts, finite, any_grad)
    if test is not None:  # SGD's blow-up guard, the one test that runs after the window
        fires = test[0] & keep
        take_back(
            rule,
            group,
            ts,
            batch.params,
            batch.states,
            plan.unit_of,
            plan.a_prev,
            test.factor,
            fires,
            change=test.change,
        )
        keep = keep & ~fires
    published = group[EFFECTIVE_LR_KEY]
    a0 = learn(rule, group, ts, plan, batch, m, update_dot, None, keep)
    group[EFFECTIVE_LR_KEY] = torch.where(keep, group[EFFECTIVE_LR_KEY], published)
    apply(rule, group, ts, plan, batch, a0, skip=~keep, pending=m.pending)


def _masks_on(device: torch.device) -> bool:
    """Whether steps on ``device`` take the masked path (no host read) where they may."""
    return device.type != "cpu" or MASK_ON_CPU


def _count_skip(ts: dict[str, Tensor], finite: Tensor, any_grad: Tensor | None) -> Tensor:
    """Masked: count a non-finite step as skipped; returns whether the step is taken.

    ``any_grad`` (sharded groups): False where no rank had a gradient, a step that changes and
    counts nothing."""
    present = torch.ones_like(finite) if any_grad is None else any_grad
    ts["skipped"] += (~finite & present).to(ts["skipped"].dtype)
    return finite & present


def _clock(group: dict[str, Any], ts: dict[str, Tensor], created: bool) -> Clock:
    search_on = group.get("growth_search") is not None and bool(group["levels"])
    return start_clock(ts, search_on) if created else clock_of(ts, search_on, host_lr(group))


def _read_outcome(
    ts: dict[str, Tensor],
    plan: Plan,
    clock: Clock,
    finite: Tensor,
    test: Retreat | None,
    search_dot: Tensor | None,
    lr: float | None,
) -> tuple[bool, bool]:
    """The step's one host read: skip it, take the last step back, or take it (and does the
    growth search go on). Records the outcome on the host's ``clock``."""
    flags = [~finite, test[0] if test is not None else torch.zeros_like(finite)]
    if search_dot is not None and plan.steps_taken > 0:  # the levels' search test (none on the first step)
        flags.append(((ts["search"] >= 0) & (search_dot.to(ts["search"]) > 0)).any())
    values = torch.stack(flags).tolist()
    skip, retreat = bool(values[0]), bool(values[1]) and not values[0]
    searching = clock.searching
    if retreat:  # a step too large ends the growth search
        searching = False
    elif not skip and len(values) > 2:
        searching = bool(values[2])
    clock.advance(taken=not (skip or retreat), searching=searching, lr=lr)
    return skip, retreat


def _batch(group: dict[str, Any], state: Any, sharded: bool, owner: str) -> Batch | None:
    """The group's tensors with a gradient (None when there are none and no rank needs this one)."""
    indexed = [(i, p) for i, p in enumerate(group["params"]) if p.grad is not None]
    if not indexed and not sharded:
        return None
    for _, p in indexed:
        if p.grad.is_sparse:
            raise RuntimeError(
                f"{owner} does not support sparse gradients; make them dense (e.g. nn.Embedding(..., sparse=False)) "
                "or give those parameters torch.optim.SparseAdam"
            )
        if torch.is_complex(p):
            raise RuntimeError(f"{owner} does not support complex parameters; optimize torch.view_as_real(p) instead")
    params, grads = distributed.local_parts([p for _, p in indexed], sharded, owner)
    return Batch(params, grads, [state[p] for _, p in indexed], [i for i, _ in indexed])


def _clip_signal(m: Measurement) -> ClipSignal | None:
    """This step's gradient norm and largest entry, when the start-up window measured them."""
    if m.grad_norm_sq is None or m.gmax is None:
        return None
    return ClipSignal(m.grad_norm_sq, m.gmax)


def _update_dot(plan: Plan, m: Measurement) -> Tensor:
    """``<g_s, Δ>`` against the trail (``D = E / (1 - γ)``) or the last update ``Δ = a_{0,s-1} d_{0,s-1}``;
    lagged, the last taken step's value, already divided by its weight (:mod:`stepsize_tower.lag`)."""
    if m.trail_dot is not None and plan.lagged:
        return m.trail_dot
    if m.trail_dot is not None:
        return m.trail_dot / plan.trail_weight
    return m.prev_dot * plan.a_prev


def _all_finite(m: Measurement, update_dot: Tensor) -> Tensor:
    checks = [update_dot, m.slope, m.prev_dot] + [c for c in (m.gmax, m.tangent_dots) if c is not None]
    return m.finite & torch.isfinite(torch.cat([c.reshape(-1) for c in checks])).all()


def learn(
    rule: BaseRule,
    group: dict[str, Any],
    ts: dict[str, Tensor],
    plan: Plan,
    batch: Batch,
    m: Measurement,
    update_dot: Tensor,
    search_dot: Tensor | None,
    keep: Tensor | None = None,
) -> Tensor:
    """Learned hyperparameters, then the levels; returns this step's ``a_0`` [U] and counts the step.

    With ``keep`` (a 0-dim bool tensor), masked: where it is False the state stays as it was.
    """
    if keep is None:
        ts["retreated"].fill_(0)
    else:
        ts["retreated"].copy_(torch.where(keep, 0.0, ts["retreated"]))
    if m.tangent_dots is not None:
        hyperparam_step(ts, m.tangent_dots, plan.a_prev.mean(), Level(**group["hyper_level"]), keep)
        ts["prev_lr"] = plan.lr0 if keep is None or "prev_lr" not in ts else torch.where(keep, plan.lr0, ts["prev_lr"])
    u_before = ts["log_step"][:, 0].clone() if plan.levels else None
    if plan.levels:
        levels = levels_while_annealing(plan.levels, group["schedule_hold_back"]) if plan.annealing else plan.levels
        a0 = tower_step(ts, levels, update_dot, group["lr"], search_dot, plan.search_max_move, keep)
    else:
        a0 = plan.lr0.expand(plan.units)
    limit = group.get("first_step_limit")
    if limit is not None and (plan.steps_taken == 0 or plan.rising) and plan.levels and rule.normalized:
        a0 = limit_first_step(ts, a0, float(limit), _typical_scale(group, plan, batch.params, a0), keep)
    elif plan.steps_taken == 0 and plan.levels and not rule.normalized and group["retreat"]:  # so a retreat can undo it
        per_unit_lr = _typical_scale(group, plan, batch.params, a0) / _typical_scale(group, plan, batch.grads, a0)
        a0 = limit_first_step(ts, a0, FIRST_MOVE_LIMIT, per_unit_lr, keep)
    if u_before is not None and plan.horizon > 0 and not plan.rising:  # a capped warm-up step is no fall
        active = plan.steps_taken >= RETREAT_WINDOW
        trail.forget_larger_steps(ts, u_before, batch.states, plan.unit_of, keep, active, also=m.pending)
    publish_effective_lr(group, a0)
    if keep is None:
        ts["prev_slope"].copy_(m.slope)
        if m.gmax is not None and plan.blowup_guard:
            torch.maximum(ts["peak_gmax"], m.gmax, out=ts["peak_gmax"])
        ts["step"] += 1
        return a0
    ts["prev_slope"].copy_(torch.where(keep, m.slope, ts["prev_slope"]))
    if m.gmax is not None and plan.blowup_guard:
        ts["peak_gmax"].copy_(torch.where(keep, torch.maximum(ts["peak_gmax"], m.gmax), ts["peak_gmax"]))
    ts["step"] += keep.to(ts["step"].dtype)
    return a0


def _typical_scale(group: dict[str, Any], plan: Plan, tensors: list[Tensor], a0: Tensor) -> Tensor:
    return typical_scale(
        tensors,
        plan.unit_of,
        a0.shape[0],
        a0.device,
        reduce_group=distributed.shard_group(group["params"]) if plan.sharded else None,
        sharded=plan.sharded,
        per_tensor_shards=any(distributed.is_dtensor(p) for p in group["params"]),
    )


def apply(
    rule: BaseRule,
    group: dict[str, Any],
    ts: dict[str, Tensor],
    plan: Plan,
    batch: Batch,
    a0: Tensor,
    skip: Tensor | None = None,
    pending: Tensor | None = None,
) -> None:
    """The base update with step sizes ``a0`` [units], folded into the trail when ``horizon > 0``;
    with ``lagged``, the trail hypergradient taken on the way (or ``pending``, measured before
    the step) is kept for the next step.

    ``skip``: a 0-dim bool tensor; where it holds, nothing changes (no host read).
    """
    horizon = plan.horizon if plan.levels else 0.0
    lagged, weight = lag.wanted(group, horizon), plan.trail_weight
    if not lagged:  # turned off (or no trail): a value kept before would be stale if turned on again
        ts.pop(lag.LAG_KEY, None)
    if not batch.params:  # a rank holding none of a sharded group's parameters (its part of h is 0)
        if lagged:
            _keep_lagged(group, ts, plan, torch.zeros(plan.units, dtype=torch.float64, device=ts["step"].device), skip)
        return
    learned = ts.get("hyper_value")
    per_unit = [a0[u] for u in range(a0.shape[0])]  # one tensor per unit: one fused kernel call per unit
    step_sizes = [per_unit[u] for u in plan.unit_of]
    params, grads, states = batch.params, batch.grads, batch.states
    if horizon == 0:
        rule.update(group, learned, params, grads, states, step_sizes, skip)
        return
    trails = trail.ensure(params, states)
    in_pass = lagged and pending is None
    if a0.shape[0] == 1 and has_trail_kernels(rule) and skip is None and not isinstance(weight, Tensor):
        done, h = rule.update_with_trail(group, params, grads, states, trails, a0[0], weight, with_dot=in_pass)
        if done:
            h = pending if h is None else h
            if lagged and h is not None:
                _keep_lagged(group, ts, plan, h, skip)
            return
    h = trail_dot_of(rule, group, plan, batch, ts["step"].device) if in_pass else pending

    def move() -> None:
        rule.update(group, learned, params, grads, states, step_sizes, skip)

    trail.fold_update(trails, params, weight, move, skip)
    if lagged and h is not None:
        _keep_lagged(group, ts, plan, h, skip)


def _keep_lagged(group: dict[str, Any], ts: dict[str, Tensor], plan: Plan, h: Tensor, skip: Tensor | None) -> None:
    """Keep the update pass's ``h`` for the next step, summed over the ranks of a sharded group."""
    if plan.sharded:
        h = distributed.sum_across_ranks(h, distributed.shard_group(group["params"]))
    lag.keep(ts, h, plan.trail_weight, skip)


def plain_step(
    rule: BaseRule, group: dict[str, Any], state: Any, ts: dict[str, Tensor], batch: Batch, sharded: bool
) -> None:
    """Depth 0, nothing learned: the base optimizer itself, with non-finite steps skipped.

    On the CPU it is ``torch.optim``'s own update (bitwise its default path) after one read of
    the finiteness flag. Elsewhere (or with :data:`MASK_ON_CPU`) it reads nothing:
    :func:`_masked_plain_step`.
    """
    device = ts["step"].device
    finite = grads_finite(batch.grads) if batch.grads else torch.ones((), dtype=torch.bool, device=device)
    any_grad = None
    if sharded:
        any_grad, finite, _, _ = distributed.reduce_across_ranks(
            len(batch.params), finite, [], None, distributed.shard_group(group["params"])
        )
    if _masks_on(device):
        _masked_plain_step(rule, group, ts, batch, finite, any_grad)
        _drop_empty_states(group, state, batch)
        return
    if any_grad is not None and not bool(any_grad):
        return  # no rank had a gradient in this group
    if not bool(finite):
        ts["skipped"] += 1
        return
    ts["step"] += 1
    lr = lr_tensor(group, ts)
    publish_effective_lr(group, lr)
    rule.torch_update(group, batch.params, batch.grads, batch.states)
    _drop_empty_states(group, state, batch)


def _masked_plain_step(
    rule: BaseRule, group: dict[str, Any], ts: dict[str, Tensor], batch: Batch, finite: Tensor, any_grad: Tensor | None
) -> None:
    """Depth 0 with no host read: the base's own update at ``a_0 = lr``, undone where a gradient
    is not finite (torch's fused kernels take the skip as ``found_inf``). The same update as
    ``torch.optim`` up to rounding: fused kernels where they apply, which its default path on
    an accelerator (foreach, step counts read per tensor) is not. ``any_grad`` as in
    :func:`_masked_step`."""
    taken = _count_skip(ts, finite, any_grad)
    ts["step"] += taken.to(ts["step"].dtype)
    lr = lr_tensor(group, ts)
    published = group.get(EFFECTIVE_LR_KEY)
    publish_effective_lr(group, lr)
    if published is not None:  # a skipped step leaves the published step size as it was
        group[EFFECTIVE_LR_KEY] = torch.where(taken, group[EFFECTIVE_LR_KEY], published)
    rule.update(group, None, batch.params, batch.grads, batch.states, [lr[0]] * len(batch.params), ~taken)


def _drop_empty_states(group: dict[str, Any], state: Any, batch: Batch) -> None:
    """A base that keeps nothing (plain SGD) leaves no state entry, as in ``torch.optim``."""
    for i, st in zip(batch.indices, batch.states, strict=True):
        if not st:
            del state[group["params"][i]]
