"""Upper levels of a tower: scalar optimizers that learn the step size below them.

Notation (see ``DEVELOPERS.md``): level 0 is the base optimizer, which moves the
weights with step size ``a_0``. Level ``k >= 1`` learns ``a_{k-1}`` and has its own
step size ``a_k``; the top level ``D``'s step size is fixed.

Every learned step size lives in log space, so it is positive by construction::

    a_0 = lr * exp(u_0)          (lr = group["lr"], owned by any scheduler)
    a_k = exp(u_k)               for 1 <= k < D
    a_D = levels[-1].lr          (fixed)

One step ``s`` of the tower, given the base's dot product ``<g_s, Δ>`` of the new gradient
with the last update ``Δ = a_{0,s-1} d_{0,s-1}`` (horizon 0, one step back) or with the
decaying trail of updates ``D_{s-1} = Σ_j γ^(s-1-j) Δ_j`` (horizon γ > 0)::

    ĥ_1 = -<g_s, Δ>                                    (= dL_s/du_{0,s-1} when γ = 0)
    ĥ_{k+1} = -ĥ_k d_{k,s-1} a_{k,s-1}                 (= dL_s/du_{k,s-1})
    d_{k,s} = ĥ_k                                     (kind "sgd")
    d_{k,s} = m̂_k / (sqrt(v̂_k) + eps)                 (kind "adam", moments of ĥ_k)
    u_{k-1,s} = u_{k-1,s-1} - clip(a_{k,s} d_{k,s}, ±1)   for k = D, D-1, ..., 1 (top-down)

Top-down means level ``k`` uses the step size ``a_{k,s}`` that level ``k+1``
produced in the same step. All state is float64 so that tiny hypergradients
(step sizes of 1e-7 and below) neither underflow nor vanish under ``eps``.

Growth search (``search_max_move = c_max``): a step size far too small grows by about
``a_1`` per step in log space, so from 1e-7 it needs a few hundred steps to become useful.
While every step so far has passed the engine's test (``search_dot > 0``: the loss still
falls along the last step at least half as fast as when the step began; it is a one-step
test, which does not lag like the trail), level 1's move on ``u_0`` becomes an exponential
search::

    u_{0,s} = u_{0,s-1} - c_s,   c_s = min(c, max(ρ^n c, -c_max))   when c < 0 (growth)

with ``c = a_1 d_1`` the level's own move, ``ρ = SEARCH_SPEEDUP`` and ``n`` the steps
searched so far. The first step that fails the test (or a retreat) ends the search for
good, and level 1's first moment restarts from that step's hypergradient (it holds the
search's growth, which would otherwise carry ``a_0`` on past the point the test found).
From then on the levels alone move ``u_0``. The search is a start-up bracket, like the
retreats not part of the differentiated update: the hypergradients of levels above 1 use
``a_1`` unboosted.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import torch
from torch import Tensor

__all__ = [
    "HYPERGRAD_BOUND",
    "LEVEL_KINDS",
    "LOG_STEP_BOUND",
    "MAX_LOG_CHANGE",
    "SEARCH_SPEEDUP",
    "Level",
    "check_growth_search",
    "current_step_sizes",
    "init_tower_state",
    "resolve_levels",
    "tower_step",
]

LEVEL_KINDS = ("sgd", "adam")

#: Hypergradients are clamped to ``±HYPERGRAD_BOUND`` so that their squares (the moments of
#: kind "adam") stay finite in float64 even when "sgd" levels feed on each other.
HYPERGRAD_BOUND = 1e100

#: No level changes its log step size by more than this in one step (a factor of e).
MAX_LOG_CHANGE = 1.0

#: The growth search's boost on level 1's move grows by this factor per searched step.
SEARCH_SPEEDUP = 1.1

#: Bound on ``n log ρ`` of the growth search's boost ``ρ^n`` (keeps it finite in float64).
_SEARCH_MAX_LOG_BOOST = 200.0
_LOG_SEARCH_SPEEDUP = math.log(SEARCH_SPEEDUP)

#: Log step sizes are clamped to ``[-LOG_STEP_BOUND, LOG_STEP_BOUND]`` (about 1e-30 ... 1e30
#: relative for level 0), which keeps every step size finite by construction.
LOG_STEP_BOUND = 69.0

_STATE_DTYPE = torch.float64

#: Up to this many learned step sizes (units x levels) on the CPU, the level arithmetic runs
#: in Python floats; above it, as tensor operations.
HOST_MATH_MAX = 8


@dataclass(frozen=True)
class Level:
    """One upper level of a tower.

    Args:
        kind: ``"adam"`` (normalized moments of the log-space hypergradient; moves
            ``log a`` by about ``lr`` per step whatever the scale of the loss) or
            ``"sgd"`` (plain descent on ``log a``; scale-dependent).
        lr: this level's own step size ``a_k``. Fixed if this is the top level,
            otherwise its initial value, learned by the level above.
        betas: moment coefficients for ``kind="adam"`` (default: (0.9, 0.999)).
        eps: added to ``sqrt(v̂)`` for ``kind="adam"`` (default: 1e-30: hypergradients
            are tiny when the step size is tiny, so a larger ``eps`` would freeze the level).
    """

    kind: str = "adam"
    lr: float = 0.02
    betas: tuple[float, float] = (0.9, 0.999)
    eps: float = 1e-30

    def __post_init__(self) -> None:
        if self.kind not in LEVEL_KINDS:
            raise ValueError(f"Invalid level kind: {self.kind!r}; expected one of {', '.join(map(repr, LEVEL_KINDS))}")
        if not (isinstance(self.lr, (int, float)) and math.isfinite(self.lr) and self.lr > 0):
            raise ValueError(f"Invalid level lr: {self.lr!r}; expected a finite number > 0")
        if len(self.betas) != 2 or not all(0.0 <= b < 1.0 for b in self.betas):
            raise ValueError(f"Invalid level betas: {self.betas!r}; expected two numbers in [0, 1)")
        if not (math.isfinite(self.eps) and self.eps >= 0):
            raise ValueError(f"Invalid level eps: {self.eps!r}; expected a finite number >= 0")


def check_growth_search(max_move: Any) -> None:
    """Raise ``ValueError`` unless ``max_move`` is None or a number in (0, MAX_LOG_CHANGE]."""
    if max_move is None:
        return
    if (
        isinstance(max_move, bool)
        or not isinstance(max_move, (int, float))
        or not (math.isfinite(max_move) and 0 < max_move <= MAX_LOG_CHANGE)
    ):
        raise ValueError(
            f"Invalid growth_search: {max_move!r}; expected a number in (0, {MAX_LOG_CHANGE:g}] (the start-up "
            "search grows log(lr) by at most that much per step) or None to turn the search off"
        )


def resolve_levels(depth: int | None, levels: Sequence[Level | str | dict[str, Any]] | None) -> tuple[Level, ...]:
    """Turn the ``depth`` / ``levels`` constructor arguments into a tuple of levels.

    ``levels`` wins when given (a string is a level kind with that kind's default
    settings; a dict holds :class:`Level` fields, as read from JSON or YAML); ``depth``
    alone gives the measured default levels
    (:func:`stepsize_tower.defaults.default_levels`); neither gives the default depth.
    Giving both requires ``len(levels) == depth``.
    """
    from .defaults import DEFAULT_DEPTH, default_levels

    if depth is not None and (isinstance(depth, bool) or not isinstance(depth, int) or depth < 0):
        raise ValueError(f"Invalid depth: {depth!r}; expected an integer >= 0 (0 = a plain fixed-rate optimizer)")
    if levels is None:
        return default_levels(DEFAULT_DEPTH if depth is None else depth)
    if isinstance(levels, (str, Level)):
        raise ValueError(f"Invalid levels: {levels!r}; expected a list of Level objects or kind names")
    resolved: list[Level] = []
    for i, lv in enumerate(levels):
        if isinstance(lv, Level):
            resolved.append(lv)
        elif isinstance(lv, str) and lv in LEVEL_KINDS:
            resolved.append(Level(kind=lv))
        elif isinstance(lv, dict):
            unknown = sorted(set(lv) - {"kind", "lr", "betas", "eps"})
            if unknown:
                raise ValueError(f"Invalid levels[{i}]: unknown key(s) {unknown}; expected kind, lr, betas, eps")
            fields: dict[str, Any] = {k: tuple(v) if k == "betas" else v for k, v in lv.items()}
            resolved.append(Level(**fields))
        else:
            raise ValueError(
                f"Invalid levels[{i}]: {lv!r}; expected a Level or one of {', '.join(map(repr, LEVEL_KINDS))}"
            )
    if depth is not None and depth != len(resolved):
        raise ValueError(f"depth={depth} disagrees with len(levels)={len(resolved)}; pass one of them")
    return tuple(resolved)


def init_tower_state(levels: Sequence[Level], units: int, device: torch.device) -> dict[str, Tensor]:
    """Fresh state for a tower of ``len(levels)`` levels over ``units`` independent step sizes.

    Keys (``D = len(levels)``, ``U = units``):
      ``log_step`` [U, D]: ``u_0`` (log factor on ``group["lr"]``) then ``u_1 .. u_{D-1}``.
      ``prev_step`` [U, D]: ``a_{k,s-1}``, the step sizes used in the last step.
      ``prev_dir`` [U, D]: ``d_{k,s-1}`` for levels ``1..D``.
      ``exp_avg``, ``exp_avg_sq`` [U, D]: moments of ``ĥ`` (kind "adam").
      ``hypergrad`` [U, D]: the last ``ĥ_1 .. ĥ_D`` (for inspection and tests).
      ``prev_slope`` [U]: ``<g_{s-1}, d_{0,s-1}>``, the last step's directional slope.
      ``peak_gmax`` []: the largest absolute gradient entry of all taken steps (SGD's guard).
      ``search`` [U]: steps of the growth search so far, or -1 once it has ended.
      ``step``, ``skipped``, ``retreats`` []: counters; ``retreated`` []: 1 if the last call retreated.
    """
    d = len(levels)
    kw: dict[str, Any] = {"dtype": _STATE_DTYPE, "device": device}
    log_step = torch.zeros(units, d, **kw)
    for k in range(1, d):
        log_step[:, k] = math.log(levels[k - 1].lr)
    return {
        "log_step": log_step,
        "prev_step": torch.zeros(units, d, **kw),
        "prev_dir": torch.zeros(units, d, **kw),
        "exp_avg": torch.zeros(units, d, **kw),
        "exp_avg_sq": torch.zeros(units, d, **kw),
        "hypergrad": torch.zeros(units, d, **kw),
        "prev_slope": torch.zeros(units, **kw),
        "peak_gmax": torch.zeros((), **kw),
        "search": torch.zeros(units, **kw),
        "step": torch.zeros((), **kw),
        "skipped": torch.zeros((), **kw),
        "retreats": torch.zeros((), **kw),
        "retreated": torch.zeros((), **kw),
    }


def current_step_sizes(ts: dict[str, Tensor], levels: Sequence[Level], lr: float | Tensor) -> Tensor:
    """All step sizes ``[a_0, a_1, ..., a_D]`` per unit, shape [U, D+1], from the state."""
    u = ts["log_step"]
    units, d = u.shape
    out = torch.empty(units, d + 1, dtype=u.dtype, device=u.device)
    out[:, :d] = u.exp()
    out[:, d] = levels[-1].lr if d else 1.0
    out[:, 0] *= lr
    return out


@functools.lru_cache(maxsize=256)
def _level_constants(
    levels: tuple[Level, ...], dtype: torch.dtype, device: torch.device
) -> tuple[Tensor, Tensor, Tensor, Tensor]:
    """Per-level ``beta1, beta2, eps`` and the "adam" mask as tensors (cached; never written to)."""
    beta1 = torch.tensor([lv.betas[0] for lv in levels], dtype=dtype, device=device)
    beta2 = torch.tensor([lv.betas[1] for lv in levels], dtype=dtype, device=device)
    eps = torch.tensor([lv.eps for lv in levels], dtype=dtype, device=device)
    is_adam = torch.tensor([lv.kind == "adam" for lv in levels], device=device)
    return beta1, beta2, eps, is_adam


def tower_step(
    ts: dict[str, Tensor],
    levels: Sequence[Level],
    update_dot: Tensor,
    lr: float | Tensor,
    search_dot: Tensor | None = None,
    search_max_move: float | None = None,
) -> Tensor:
    """Update every level in place from ``<g_s, Δ>`` and return the new ``a_0`` [U].

    ``update_dot`` has shape [U]: the new gradient against the last update (or the trail).
    On the first step (``ts["step"] == 0``) there is no previous direction: the levels stay
    as they are and ``a_0 = lr * exp(u_0)``. Call it only for steps that are taken (finite
    gradients, no retreat). With ``search_max_move`` and ``search_dot`` (``<g_s, d_{0,s-1}>``
    [U]), units still in the growth search (module docstring) grow faster; a state without
    ``"search"`` (saved before the search existed) has none.
    """
    d = len(levels)
    u = ts["log_step"]
    if d == 0:
        raise ValueError("tower_step needs at least one level; a depth-0 optimizer has nothing to learn")
    # A few scalars on the CPU: Python floats beat ~40 tiny tensor ops (measured: 30 vs 135 us
    # for one step size; the loop loses from about 15 step sizes on, e.g. granularity="tensor").
    # Compiled steps keep tensors: no graph breaks, no guards on float values.
    if search_max_move is None or search_dot is None or "search" not in ts:
        search_max_move = search_dot = None
    if u.device.type == "cpu" and u.numel() <= HOST_MATH_MAX and not torch.compiler.is_compiling():
        return _tower_step_host(ts, levels, update_dot, lr, search_dot, search_max_move)
    return _tower_step_tensors(ts, levels, update_dot, lr, search_dot, search_max_move)


def _search_move(change: float, boost: float, max_move: float) -> float:
    """Level 1's move ``change`` on ``u_0`` under the growth search's ``boost`` (growth only)."""
    if change >= 0 or boost <= 1.0:
        return change
    return min(change, max(change * boost, -max_move))


def _tower_step_tensors(
    ts: dict[str, Tensor],
    levels: Sequence[Level],
    update_dot: Tensor,
    lr: float | Tensor,
    search_dot: Tensor | None = None,
    search_max_move: float | None = None,
) -> Tensor:
    """:func:`tower_step` as tensor operations: no host read (accelerators, compiled steps)."""
    d = len(levels)
    u = ts["log_step"]
    has_prev = ts["step"] > 0
    prev_step, prev_dir = ts["prev_step"], ts["prev_dir"]

    # Hypergradients of every level, from values stored at the previous step.
    h1 = -update_dot.to(u)
    chain = torch.cat([torch.ones_like(h1)[:, None], -prev_dir[:, :-1] * prev_step[:, 1:]], dim=1)
    hyper = (h1[:, None] * torch.cumprod(chain, dim=1)).clamp(-HYPERGRAD_BOUND, HYPERGRAD_BOUND)

    # The growth search: which units go on searching, and their boost on level 1's move.
    boost = new_search = None
    max_move = MAX_LOG_CHANGE if search_max_move is None else search_max_move
    exp_avg = ts["exp_avg"]
    if search_dot is not None and search_max_move is not None:
        searched = ts["search"]
        going_on = (searched >= 0) & (search_dot.to(u) > 0)
        log_boost = (searched.clamp_min(0) * _LOG_SEARCH_SPEEDUP).clamp_max(_SEARCH_MAX_LOG_BOOST)
        boost = torch.where(going_on, log_boost.exp(), 1.0)
        new_search = torch.where(going_on, searched + 1, -1.0)
        # Where the search ends, level 1's momentum restarts: it holds the search's growth.
        ending = (searched >= 0) & ~going_on
        exp_avg = exp_avg.clone()
        exp_avg[:, 0] = torch.where(ending, 0.0, exp_avg[:, 0])

    # Each level's direction from its hypergradient.
    count = ts["step"]  # number of level updates so far == steps taken before this one
    beta1, beta2, eps, is_adam = _level_constants(tuple(levels), u.dtype, u.device)
    m = torch.lerp(exp_avg, hyper, 1 - beta1)
    v = beta2 * ts["exp_avg_sq"] + (1 - beta2) * hyper * hyper
    bc1 = 1 - beta1**count
    bc2 = 1 - beta2**count
    adam_dir = (m / bc1) / ((v / bc2).sqrt() + eps)
    direction = torch.where(is_adam, adam_dir, hyper)

    # Top-down: level k moves u_{k-1} with the step size a_k it was just given.
    new_u = u.clone()
    step_k: Tensor | float = levels[-1].lr
    for k in range(d, 0, -1):
        change = (step_k * direction[:, k - 1]).clamp(-MAX_LOG_CHANGE, MAX_LOG_CHANGE)
        if k == 1 and boost is not None:
            searched_move = torch.minimum(change, (change * boost).clamp_min(-max_move))
            change = torch.where((change < 0) & (boost > 1), searched_move, change)
        new_u[:, k - 1] = (u[:, k - 1] - change).clamp(-LOG_STEP_BOUND, LOG_STEP_BOUND)
        step_k = new_u[:, k - 1].exp()

    # Commit only where a previous direction existed.
    u.copy_(torch.where(has_prev, new_u, u))
    ts["exp_avg"].copy_(torch.where(has_prev, m, ts["exp_avg"]))
    ts["exp_avg_sq"].copy_(torch.where(has_prev, v, ts["exp_avg_sq"]))
    ts["prev_dir"].copy_(torch.where(has_prev, direction, prev_dir))
    ts["hypergrad"].copy_(torch.where(has_prev, hyper, ts["hypergrad"]))
    if new_search is not None:
        ts["search"].copy_(torch.where(has_prev, new_search, ts["search"]))
    prev_step.copy_(u.exp())
    prev_step[:, 0] *= lr
    return prev_step[:, 0].clone()


def _tower_step_host(
    ts: dict[str, Tensor],
    levels: Sequence[Level],
    update_dot: Tensor,
    lr: float | Tensor,
    search_dot: Tensor | None = None,
    search_max_move: float | None = None,
) -> Tensor:
    """:func:`tower_step` for state on the CPU, in Python floats (the same float64 math, not
    tensor ops: a tower's few scalars cost more in per-op overhead than in arithmetic).

    Agrees with the tensor path to rounding (``exp``/``log``/``pow`` may differ in the last bit).
    """
    d = len(levels)
    u = ts["log_step"].tolist()
    prev_step, prev_dir = ts["prev_step"].tolist(), ts["prev_dir"].tolist()
    exp_avg, exp_avg_sq = ts["exp_avg"].tolist(), ts["exp_avg_sq"].tolist()
    count = float(ts["step"])
    lr_value = float(lr)
    searching = search_dot is not None and search_max_move is not None
    searched = ts["search"].tolist() if searching else []
    search_dots = search_dot.tolist() if search_dot is not None else []
    max_move = MAX_LOG_CHANGE if search_max_move is None else search_max_move
    if count > 0:
        hyper_all = []
        for unit, h1 in enumerate(update_dot.tolist()):
            hyper, scale = [], -h1
            for k in range(d):
                if k:
                    scale *= -prev_dir[unit][k - 1] * prev_step[unit][k]
                hyper.append(min(max(scale, -HYPERGRAD_BOUND), HYPERGRAD_BOUND))
            boost = 1.0
            if searching and searched[unit] >= 0:
                if search_dots[unit] > 0:
                    boost = math.exp(min(searched[unit] * _LOG_SEARCH_SPEEDUP, _SEARCH_MAX_LOG_BOOST))
                    searched[unit] += 1
                else:  # the search ends; level 1's momentum, which holds its growth, restarts
                    searched[unit] = -1.0
                    exp_avg[unit][0] = 0.0
            direction = []
            for k, lv in enumerate(levels):
                h, (b1, b2) = hyper[k], lv.betas
                m = exp_avg[unit][k] + (1 - b1) * (h - exp_avg[unit][k])
                v = b2 * exp_avg_sq[unit][k] + (1 - b2) * h * h
                exp_avg[unit][k], exp_avg_sq[unit][k] = m, v
                if lv.kind == "adam":
                    direction.append((m / (1 - b1**count)) / (math.sqrt(v / (1 - b2**count)) + lv.eps))
                else:
                    direction.append(h)
            step_k = levels[-1].lr
            for k in range(d, 0, -1):
                change = min(max(step_k * direction[k - 1], -MAX_LOG_CHANGE), MAX_LOG_CHANGE)
                if k == 1:
                    change = _search_move(change, boost, max_move)
                u[unit][k - 1] = min(max(u[unit][k - 1] - change, -LOG_STEP_BOUND), LOG_STEP_BOUND)
                step_k = math.exp(u[unit][k - 1])
            prev_dir[unit] = direction
            hyper_all.append(hyper)
        for key, rows in (("log_step", u), ("exp_avg", exp_avg), ("exp_avg_sq", exp_avg_sq), ("prev_dir", prev_dir)):
            _store(ts[key], rows)
        _store(ts["hypergrad"], hyper_all)
        if searching:
            _store(ts["search"], [searched])
    steps = [[math.exp(x) for x in row] for row in u]
    for row in steps:
        row[0] *= lr_value
    _store(ts["prev_step"], steps)
    return ts["prev_step"][:, 0].clone()


def _store(t: Tensor, rows: list[list[float]]) -> None:
    """Write Python floats ``rows`` [U][D] (or [1][U] for a [U] tensor) into state tensor ``t``."""
    if t.numel() == 1:
        t.fill_(rows[0][0])
    else:
        t.copy_(torch.tensor(rows, dtype=_STATE_DTYPE).reshape(t.shape))
