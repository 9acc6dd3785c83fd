r"""Safeguards of the step: the start-up test, SGD's blow-up guard, and the first-step limit.

Retreat (the start-up test): along the last direction ``d = d_{0,s-1}``, the loss
``φ(a) = L(w_{s-2} - a d)`` has slope ``φ'(0) = -<g_{s-1}, d>`` at the start of the last step
and ``φ'(a_{0,s-1}) = -<g_s, d>`` at its end. On a quadratic, ``rho = φ'(a)/φ'(0) < -1``
exactly when the loss rose, and the minimizer along ``d`` is ``a / (1 - rho)``. So, during
the first ``RETREAT_WINDOW`` steps (and while the growth search goes on), the last step is
taken back and redone with that secant step size::

    w <- w_{s-2} - a_new d,   a_new = a_{0,s-1} * clip(1 / (1 - rho), RETREAT_MIN_FACTOR, 1/2)

Right after a retreat, the retried step is taken back again only when ``rho < -10`` *and* its
slope change ``c' = <g_{s-1} - g_s, d>`` is at most :data:`RETREAT_CURVATURE_JUMP` times the
``f c`` that the first test's change predicts for the step ``f`` times shorter: on a quadratic
``c`` is proportional to the step size, minibatch noise is not. After an exact secant cut the
retried step sits on the quadratic's minimum, so in practice only a cut stopped at
:data:`RETREAT_MIN_FACTOR` (still too large) is retried again.

For SGD, whose update grows with the gradient, the first step moves the weights by at most
:data:`FIRST_MOVE_LIMIT` times their typical size: a retreat undoes a step by arithmetic, which
float32 cannot do after a step that dwarfs the weights.

Later, minibatch noise alone makes ``rho < -1`` too often; only bases whose update grows
with the gradient (SGD) keep a guard, against divergence: when the largest gradient entry
exceeds ``r > RETREAT_BLOWUP`` times the largest seen so far, ``a_new = a_{0,s-1} / (1 + r)``.
A retreat discards ``g_s`` (it came from a rejected point): neither the base's moments nor the
levels see it, and the trail is cleared. It costs no extra forward pass, and stops a step size
that is orders of magnitude too large from wrecking the model in its first steps.

First-step limit (normalized bases, ``first_step_limit``): an Adam-like base moves every
weight by about ``a_0`` on its first step (``|m̂ / √v̂| = 1`` there), whatever the gradient.
When ``a_0`` is larger than the weights' own typical size, that step replaces the
initialization instead of adjusting it, and the next gradient need not show it: a saturated
model has a flat loss, so the start-up test sees no overshoot. So before the first step

.. math::

    a_0 \leftarrow \min\bigl(a_0,\; c \cdot s\bigr), \qquad
    s = \exp\Bigl(\tfrac{1}{|T|} \sum_{t \in T} \log \operatorname{rms}(w_t)\Bigr),

the geometric mean over the unit's tensors ``T`` with a nonzero root-mean-square entry
(tensors are weighted alike, so a wide embedding table does not set the scale of every
matrix). All-zero tensors carry no scale; a unit with none is not limited. The levels then
take over from the limited value. ``c`` is the ``first_step_limit`` option (default
:data:`stepsize_tower.options.DEFAULT_FIRST_STEP_LIMIT`, measured; ``None`` turns it off).

The same cap applies again on every step whose ``group["lr"]`` (a scheduler's outer factor
``λ_s``) is above its largest value over the taken steps: during a warm-up the typed rate is
hidden from the first step (``λ_0`` is a small fraction of it, so the cap does not bind and
the start-up test passes at the small rate), and the rise would carry ``a_0`` past both with
nothing checking it. Measured (field benchmark, byte transformer, TowerAdamW under 5 % warm-up
+ cosine, 2 seeds): typed 1e-2 ended 2.68 before, 2.09 / 2.21 with the cap (tuned AdamW + the
same schedule 2.145 / 2.165). Decays and returns to an earlier peak are not capped; a
constant ``lr`` rises only at the first step, so without a scheduler nothing changes. The
peak is a host float (:class:`stepsize_tower.host_clock.Clock`), so the check reads nothing.
Sharded groups reduce exactly: under FSDP2 every rank holds a shard of every tensor (the
squares and counts are summed per tensor across ranks), under ZeroRedundancyOptimizer every
tensor lives whole on one rank (the logs and counts are summed).
"""

from __future__ import annotations

from typing import Any, NamedTuple

import torch
from torch import Tensor
from torch import distributed as dist

from . import clipping, lag, trail
from .bases import BaseRule, chunks
from .clipping import ClipSignal
from .group_state import EFFECTIVE_LR_KEY, publish_effective_lr

__all__ = [
    "FIRST_MOVE_LIMIT",
    "NOT_SECANT",
    "RETREAT_AGAIN_RATIO",
    "RETREAT_BLOWUP",
    "RETREAT_CURVATURE_JUMP",
    "RETREAT_MIN_FACTOR",
    "RETREAT_WINDOW",
    "Retreat",
    "limit_first_step",
    "retreat_test",
    "take_back",
    "typical_scale",
]

#: Bases whose update grows with the gradient (SGD), with ``retreat`` on: the first step moves the weights by at
#: most this many times their typical size (``a_0 <= c · s_w / s_g``, ``s`` as in
#: :func:`typical_scale`, weights and gradients). A guard of precision, not of tuning: a retreat
#: undoes a step arithmetically (``w + (a - a') d``), which in float32 loses about ``1e-7 · a |d|``;
#: after a first step 1e9 times too large (raw least squares, SGD typed 1 000, field benchmark)
#: that error alone exceeded the weights and every later step retreated (loss 5e6 against 3.7
#: in float64). Good first steps move far less (least squares at its best rate 0.003, the ResNet
#: 0.03, logistic regression from a small initialization 2.9 times its weights).
FIRST_MOVE_LIMIT = 10.0

#: Smallest factor one retreat applies to the step size (retreats on later steps compound).
RETREAT_MIN_FACTOR = 1e-4

#: Retreats are considered during the first this-many taken steps only: the start-up phase in
#: which the typed step size is still untested. Later, minibatch noise alone makes consecutive
#: gradients oppose often enough that the test would cut good step sizes (measured: see experiments/README.md).
RETREAT_WINDOW = 10

#: Right after a retreat, the retried step is taken back again only if ``rho < -RETREAT_AGAIN_RATIO``:
#: the new minibatch alone can make ``rho`` mildly negative, but not by this much.
RETREAT_AGAIN_RATIO = 10.0

#: ... and only if its slope change ``c' = <g_{s-1} - g_s, d>`` is at most this many times the
#: change the first test's curvature predicts for the smaller step, ``f c`` (on a quadratic
#: ``c`` is proportional to the step size: ``c' = f c`` exactly). Minibatch noise does not
#: shrink with the step size: measured (field benchmark, ResNet with SGD momentum typed 10, raw
#: least squares with SGD typed 1 000), noise-driven retries showed ``c' / (f c)`` of 27-40 on
#: every retry, cutting the step size 30x each time down to 1e-8 and 1e-26; a retry after a cut
#: clipped at :data:`RETREAT_MIN_FACTOR` (a real overshoot, still too large) showed 0.7-2.8.
RETREAT_CURVATURE_JUMP = 10.0

#: ``ts["retreated"]`` after a retreat of the clipping or blow-up tests: its retried step is
#: tested against ``-RETREAT_AGAIN_RATIO`` alone (their factors predict no slope change).
NOT_SECANT = -1.0

#: At any step, a step of a base whose update grows with the gradient (SGD) is taken back when
#: the largest gradient entry exceeds this factor ``r`` times the largest one seen so far in the
#: run (a divergence: near convergence, gradients far below the peak may jump by 10x harmlessly).
#: On a quadratic the gradient along the sharpest direction grows by ``|1 - a / a*|`` per step,
#: so the step size is cut to ``a / (1 + r)``. The trail of updates is cleared: it held the
#: unstable steps.
RETREAT_BLOWUP = 10.0


class Retreat(NamedTuple):
    """A test's verdict (0-dim tensors): take the last step back, the factor on ``a_{0,s-1}``,
    and the slope change ``c = <g_{s-1} - g_s, d_{0,s-1}>`` it saw (:data:`NOT_SECANT`: not the
    secant test)."""

    fires: Tensor
    factor: Tensor
    change: Tensor


def retreat_test(
    ts: dict[str, Tensor],
    prev_dot: Tensor,
    gmax: Tensor | None,
    startup_test: bool,
    clip: ClipSignal | None = None,
) -> Retreat | None:
    """Whether to take the last step back, by what factor, and the slope change seen; no read.

    ``prev_dot``: ``<g_s, d_{0,s-1}>`` per unit; ``gmax``: the largest gradient entry when the
    blow-up guard runs; ``clip``: this step's gradient norm and largest entry during the
    start-up window (:mod:`stepsize_tower.clipping`). None when no test runs this step.
    """
    unchecked = torch.full_like(ts["retreated"], NOT_SECANT)
    tests: list[Retreat] = []  # first firing wins
    if startup_test:  # the loss rose along the last step (secant ratio rho)
        prev_slope = ts["prev_slope"].sum()
        rho = prev_dot.sum() / prev_slope
        change = prev_slope - prev_dot.sum()
        tests.append(Retreat(_rose(ts["retreated"], prev_slope, rho, change), 1.0 / (1.0 - rho), change))
        if clip is not None:  # clipped gradients hide the rise: the direction reversed
            tests.append(Retreat(*clipping.reversal(ts, rho, prev_slope, clip), unchecked))
    if gmax is not None:  # any time (SGD): the largest gradient entry grew RETREAT_BLOWUP x
        blowup_ratio = gmax / ts["peak_gmax"]
        fires = (ts["peak_gmax"] > 0) & (blowup_ratio > RETREAT_BLOWUP)
        tests.append(Retreat(fires, 1.0 / (1.0 + blowup_ratio), unchecked))
    if not tests:
        return None
    retreat, factor, change = tests[0].fires, tests[-1].factor, tests[-1].change
    for test in tests[1:]:
        retreat = retreat | test.fires
    for test in reversed(tests[:-1]):
        factor = torch.where(test.fires, test.factor, factor)
        change = torch.where(test.fires, test.change, change)
    return Retreat(retreat, factor, change)


def _rose(expected: Tensor, prev_slope: Tensor, rho: Tensor, change: Tensor) -> Tensor:
    """The start-up test: the loss rose along the last step (``rho < -1``; right after a
    retreat ``rho < -RETREAT_AGAIN_RATIO``, and only with a slope change the curvature seen by
    that retreat can explain: ``change <= RETREAT_CURVATURE_JUMP * expected``)."""
    again = expected != 0
    threshold = torch.where(again, -RETREAT_AGAIN_RATIO, -1.0)
    explained = ~again | (expected < 0) | (change <= RETREAT_CURVATURE_JUMP * expected)
    return (prev_slope > 0) & (rho < threshold) & explained


def take_back(
    rule: BaseRule,
    group: dict[str, Any],
    ts: dict[str, Tensor],
    params: list[Tensor],
    states: list[dict[str, Any]],
    unit_of: list[int],
    a_prev: Tensor,
    factor: Tensor,
    fires: Tensor | None = None,
    *,
    change: Tensor,
) -> None:
    """Take the last step back and redo it with ``a_prev * factor`` (clipped); the levels stay as they are.

    ``change``: the slope change the test saw (:data:`NOT_SECANT`: not the secant test); the
    retried step is expected to show ``factor * change`` (kept in ``ts["retreated"]``).

    With ``fires`` (a 0-dim bool tensor) it is masked, with no host read: where ``fires`` is
    False the factor is exactly 1, so the weights move by ``(a - a) d = 0``, ``log 1 = 0`` is
    added to ``u_0``, and the trail and counters stay as they are.
    """
    factor = torch.clamp(factor, min=RETREAT_MIN_FACTOR, max=0.5)
    expected = torch.where(change < 0, NOT_SECANT, factor * change).to(ts["retreated"])
    if fires is not None:
        factor = torch.where(fires, factor, 1.0)
    a_new = a_prev * factor
    learned = ts.get("hyper_value")
    for p, st, u in zip(params, states, unit_of, strict=True):
        rule.retreat(group, learned, p, st, a_prev[u], a_new[u])
        if fires is None:  # the trail held the unstable steps
            trail.clear(st)
        else:
            trail.clear_where(st, fires)
    lag.restart(ts, fires)
    ts["log_step"][:, 0] += factor.log()
    ts["prev_step"][:, 0] = a_new
    before = group.get(EFFECTIVE_LR_KEY)
    publish_effective_lr(group, a_new)
    if fires is None:
        if "search" in ts:  # a step too large ends the growth search
            ts["search"].fill_(-1.0)
        ts["retreats"] += 1
        ts["retreated"].copy_(expected)
        return
    if "search" in ts:
        ts["search"].copy_(torch.where(fires, -1.0, ts["search"]))
    ts["retreats"] += fires.to(ts["retreats"].dtype)
    ts["retreated"].copy_(torch.where(fires, expected, ts["retreated"]))
    if before is not None:
        group[EFFECTIVE_LR_KEY] = torch.where(fires, group[EFFECTIVE_LR_KEY], before)


def limit_first_step(
    ts: dict[str, Tensor],
    a0: Tensor,
    limit: float,
    scale: Tensor,
    keep: Tensor | None = None,
) -> Tensor:
    """``a_0 <- min(a_0, limit * scale)`` per unit, the levels' state moved alike (masked by ``keep``)."""
    cap = limit * scale
    over = (scale > 0) & (a0 > cap)
    if keep is not None:
        over = over & keep
    ratio = torch.where(over, cap / torch.where(over, a0, 1.0), 1.0)
    ts["log_step"][:, 0] += ratio.log()
    ts["prev_step"][:, 0] *= ratio
    return a0 * ratio


def typical_scale(
    params: list[Tensor],
    unit_of: list[int],
    units: int,
    device: torch.device,
    *,
    reduce_group: Any = None,
    sharded: bool = False,
    per_tensor_shards: bool = False,
) -> Tensor:
    """Per unit, the geometric mean of the nonzero per-tensor RMS values (0 where there is none).

    ``params`` are this rank's (local) tensors. With ``sharded``, the values are completed
    across ``reduce_group``: per tensor when every rank holds a shard of every tensor
    (``per_tensor_shards``, FSDP2), else per unit (whole tensors spread over ranks, ZeRO).
    Every rank of a sharded group must call it (it all-reduces). Float64, shape [units].
    """
    dtype = torch.float64
    if params:
        squares = torch.stack([torch.linalg.vector_norm(chunks.flat(p), dtype=dtype) ** 2 for p in params]).to(device)
    else:
        squares = torch.zeros(0, dtype=dtype, device=device)
    counts = torch.tensor([float(p.numel()) for p in params], dtype=dtype, device=device)
    if sharded and per_tensor_shards:
        packed = torch.cat([squares, counts])
        dist.all_reduce(packed, op=dist.ReduceOp.SUM, group=reduce_group)
        squares, counts = packed[: len(params)], packed[len(params) :]
    rms = (squares / counts.clamp(min=1.0)).sqrt()
    present = rms > 0
    logs = torch.where(present, rms.clamp(min=torch.finfo(dtype).tiny).log(), 0.0)
    index = torch.tensor(unit_of, dtype=torch.long, device=device)
    log_sum = _sum_into_units(logs, index, units)
    count = _sum_into_units(present.to(dtype), index, units)
    if sharded and not per_tensor_shards:
        packed = torch.cat([log_sum, count])
        dist.all_reduce(packed, op=dist.ReduceOp.SUM, group=reduce_group)
        log_sum, count = packed[:units], packed[units:]
    return torch.where(count > 0, (log_sum / count.clamp(min=1.0)).exp(), 0.0)


def _sum_into_units(values: Tensor, index: Tensor, units: int) -> Tensor:
    """``out[u] = Σ_{i: index[i] = u} values[i]``, float64, shape [units].

    Under ``torch.compile`` as a product with a one-hot matrix: inductor's CPU code for a
    float64 ``index_add_`` into a one-element buffer fails to generate (torch 2.13).
    """
    if torch.compiler.is_compiling():
        onehot = (index[:, None] == torch.arange(units, device=index.device)[None, :]).to(values.dtype)
        return values @ onehot
    return torch.zeros(units, dtype=values.dtype, device=values.device).index_add_(0, index, values)
