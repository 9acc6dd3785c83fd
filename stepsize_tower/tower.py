"""The engine shared by every tower optimizer: one ``step`` for any base and any levels.

A base (level 0, :class:`BaseRule`) knows how to move the weights and how to take dot
products of a new gradient with its directions; the levels (:mod:`stepsize_tower.levels`)
turn those into new step sizes. This module orders the two, handles skipped steps and
retreats, and keeps every learned value in the optimizer's state.

Order inside one step ``s`` (per parameter group)::

    1. measure: <g_s, Δ> against the last update (horizon 0) or the trail of updates,
       and in the start-up window the secant ratio rho (base.probe; reads only)
    2. anything non-finite                  -> skip: nothing changes, ``skipped += 1``
    3. the loss rose, or the gradient blew up -> retreat (below), ``retreats += 1``
    4. levels, top-down                     -> a_{0,s}                (levels.tower_step)
    5. base update                          -> w_s = w_{s-1} - a_{0,s} d_{0,s}

Retreat: along the last direction ``d = d_{0,s-1}``, the loss ``φ(a) = L(w_{s-2} - a d)``
has slope ``φ'(0) = -<g_{s-1}, d>`` at the start of the last step and
``φ'(a_{0,s-1}) = -<g_s, d>`` at its end. On a quadratic, ``rho = φ'(a)/φ'(0) < -1``
exactly when the loss rose, and the minimizer along ``d`` is ``a / (1 - rho)``. So, during
the first ``RETREAT_WINDOW`` steps, the last step is taken back and redone with that secant
step size::

    w <- w_{s-2} - a_new d,   a_new = a_{0,s-1} * clip(1 / (1 - rho), RETREAT_MIN_FACTOR, 1/2)

Later, minibatch noise alone makes ``rho < -1`` too often; only bases whose update grows
with the gradient (SGD) keep a guard, against divergence: when the largest gradient entry
exceeds ``r > RETREAT_GROWTH`` times the largest seen so far, ``a_new = a_{0,s-1} / (1 + r)``. A retreat
discards ``g_s`` (it came from a rejected point): neither the base's moments nor the levels
see it. It costs no extra forward pass, and stops a step size that is orders of magnitude
too large from wrecking the model in its first steps.

Host reads: the step count and one skip/retreat flag per group are read from the device
each step; all learned values stay tensors.

Sharded parameters (``sharded=True``): under ``ZeroRedundancyOptimizer`` or FSDP2 each rank
holds only part of a group, so every dot product above is a partial sum. Before anything is
decided, :func:`_reduce_across_ranks` sums them over the group's sharding ranks (one
all-reduce of a packed float64 vector; a second one takes the maximum of the largest gradient
entry when the SGD growth guard needs it), so every rank skips, retreats and learns the same
step sizes. The sharding ranks are the default process group for ZeRO, the mesh's group for
FSDP2, and only the sharding dimension's group under HSDP (a 2-D mesh whose other dimension
replicates: replicas hold the same shard) (:func:`_shard_group`). A rank that holds no
parameter of the group still takes part (with zeros). Off by default, and without an
initialized process group it does nothing: no collective is called.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Callable, Iterable, Sequence
from typing import Any, Protocol

import torch
from torch import Tensor
from torch import distributed as dist
from torch.optim import Optimizer

from . import _chunks, _rank_check, _resume
from ._first_step import check_first_step_limit, typical_scale
from .hyper import hyper_step, init_hyper_state
from .levels import Level, check_growth_search, current_step_sizes, init_tower_state, tower_step

__all__ = [
    "EFFECTIVE_LR_KEY",
    "GRANULARITIES",
    "RETREAT_AGAIN_RATIO",
    "RETREAT_GROWTH",
    "RETREAT_MIN_FACTOR",
    "RETREAT_WINDOW",
    "BaseRule",
    "TowerOptimizer",
]

#: Smallest factor one retreat applies to the step size (retreats on later steps compound).
RETREAT_MIN_FACTOR = 1e-4

#: Retreats are considered during the first this-many taken steps only: the start-up phase in
#: which the typed step size is still untested. Later, minibatch noise alone makes consecutive
#: gradients oppose often enough that the test would cut good step sizes (measured: see README).
RETREAT_WINDOW = 10

#: The growth search goes on while ``<g_s, d_{s-1}> > SEARCH_SLOPE_KEPT <g_{s-1}, d_{s-1}>``: the
#: loss still falls along the last step at this fraction of the rate at which the step began. On
#: a quadratic, steps up to half the line minimizer along ``d``; with 0 (the slope's sign alone)
#: a quadratic with curvatures 0.1 ... 1 was searched up to a = 4.5 > 2/L and blew up (measured).
SEARCH_SLOPE_KEPT = 0.5

#: Right after a retreat, the retried step is taken back again only if ``rho < -RETREAT_AGAIN_RATIO``:
#: the new minibatch alone can make ``rho`` mildly negative, but not by this much.
RETREAT_AGAIN_RATIO = 10.0

#: At any step, a step of a base whose update grows with the gradient (SGD) is taken back when
#: the largest gradient entry exceeds this factor ``r`` times the largest one seen so far in the
#: run (a divergence: near convergence, gradients far below the peak may jump by 10x harmlessly).
#: On a quadratic the gradient along the sharpest direction grows by ``|1 - a / a*|`` per step,
#: so the step size is cut to ``a / (1 + r)``. The trail of updates is cleared: it held the
#: unstable steps.
RETREAT_GROWTH = 10.0

GRANULARITIES = ("group", "tensor")

#: Group key under which every step publishes the level-0 step size in effect, a 0-dim float64
#: tensor (no host read): ``group["lr"] * exp(u_0)`` as used by the last taken step, or after a
#: retreat the step size the retried step was redone with (geometric mean over the group's
#: units with ``granularity="tensor"``). Absent until the group's first step; skipped steps
#: leave it unchanged. Monitors read it instead of ``group["lr"]``, the scheduler's outer factor.
EFFECTIVE_LR_KEY = "effective_lr"

_TOWER_KEY = "tower"


class BaseRule(Protocol):
    """Level 0: the direction ``d_0`` and the weight update of one base optimizer."""

    #: True when the update is normalized (about ``a_0`` per coordinate whatever the gradient's
    #: size, as in Adam): a growing gradient then does not make a growing update.
    normalized: bool

    def hyper_initial(self, group: dict[str, Any]) -> list[float]:
        """Initial values of the hyperparameters in (0, 1) this group learns (usually none)."""
        ...

    def loss_grad(self, group: dict[str, Any], p: Tensor, grad: Tensor) -> Tensor:
        """The gradient of the minimized loss (``maximize`` and L2 decay applied)."""
        ...

    def probe(
        self,
        group: dict[str, Any],
        p: Tensor,
        grad: Tensor,
        state: dict[str, Any],
        a_prev: Tensor,
        *,
        exact: bool,
        slope: bool = True,
    ) -> tuple[Tensor, Tensor, list[Tensor]]:
        """Return ``(<g_s, d_{0,s-1}>, <g_s, d_{0,s}>, [<g_s, T_j> ...])`` for one tensor; change nothing.

        With ``exact=False`` the first two are not needed and may be returned as zeros; with
        ``slope=False`` the second (used only by the start-up test) may be.

        ``g_s`` is the gradient of the minimized loss (sign flipped under ``maximize``,
        L2 weight decay included when the base treats it as part of the loss). The first
        value is 0 when the tensor has no previous direction. ``T_j = ∂d_{0,s-1}/∂θ_j`` for
        each learned hyperparameter (see :mod:`stepsize_tower.hyper`).
        """
        ...

    def update(
        self,
        group: dict[str, Any],
        params: list[Tensor],
        grads: list[Tensor],
        states: list[dict[str, Any]],
        step_sizes: Sequence[Tensor | float],
    ) -> None:
        """Move every weight one step with its step size ``a_0``."""
        ...

    def retreat(self, group: dict[str, Any], p: Tensor, state: dict[str, Any], a_prev: Tensor, a_new: Tensor) -> None:
        """Move the weight back along its last direction: ``w <- w + (a_prev - a_new) d_{0,s-1}``."""
        ...

    def trail_dot(
        self, group: dict[str, Any], params: list[Tensor], grads: list[Tensor], states: list[dict[str, Any]]
    ) -> Tensor | None:
        """``Σ <g_s, E>`` over the whole group from a kernel of the base's own, or None to let the engine do it."""
        ...

    def update_with_trail(
        self,
        group: dict[str, Any],
        params: list[Tensor],
        grads: list[Tensor],
        states: list[dict[str, Any]],
        a0: Tensor,
        weight: float,
    ) -> bool:
        """The update with one step size ``a0`` and ``E <- (1 - weight) E + weight Δ`` in one kernel; False if not."""


def _levels_of(group: dict[str, Any]) -> tuple[Level, ...]:
    specs = group["levels"]
    return _levels_from(tuple((s["kind"], s["lr"], tuple(s["betas"]), s["eps"]) for s in specs))


@functools.lru_cache(maxsize=256)
def _levels_from(key: tuple[tuple[str, float, tuple[float, ...], float], ...]) -> tuple[Level, ...]:
    """The (validated, immutable) levels of a group's specs; cached: a step needs them every time."""
    return tuple(Level(kind=k, lr=lr, betas=(betas[0], betas[1]), eps=eps) for k, lr, betas, eps in key)


def _level_spec(level: Level | dict[str, Any]) -> dict[str, Any]:
    """A plain dict (not a dataclass) so checkpoints load with ``torch.load(weights_only=True)``."""
    lv = level if isinstance(level, Level) else Level(**level)
    return {"kind": lv.kind, "lr": lv.lr, "betas": tuple(lv.betas), "eps": lv.eps}


def _level_specs(levels: Iterable[Level | dict[str, Any]]) -> list[dict[str, Any]]:
    return [_level_spec(lv) for lv in levels]


def _check_lr(lr: float | Tensor) -> None:
    value = lr.item() if isinstance(lr, Tensor) else lr
    if not (isinstance(value, (int, float)) and math.isfinite(value) and value >= 0):
        raise ValueError(f"Invalid learning rate: {lr!r}; expected a finite number >= 0")


def _check_sharded(sharded: Any, granularity: Any) -> None:
    if sharded is not None and not isinstance(sharded, bool):
        raise ValueError(f"Invalid sharded: {sharded!r}; expected True, False or None (detect)")
    if sharded and granularity != "group":
        raise ValueError(
            f"sharded=True needs granularity='group' (got {granularity!r}): "
            "ranks hold different tensors, so per-tensor step sizes cannot be matched up"
        )


def _check_horizon(horizon: float) -> None:
    if not (isinstance(horizon, (int, float)) and 0.0 <= horizon < 1.0):
        raise ValueError(f"Invalid horizon: {horizon!r}; expected 0 <= horizon < 1 (0 = one step back)")


class TowerOptimizer(Optimizer):
    """A base optimizer whose step size is learned by a tower of levels.

    Subclasses (:class:`~stepsize_tower.TowerSGD`, :class:`~stepsize_tower.TowerAdam`, ...)
    choose the base rule and validate its hyperparameters; this class owns the step.

    Per-group options (every one can differ between parameter groups):
        ``lr``: the outer factor on the learned step size. Schedulers own it: the step
            size actually used is ``group["lr"] * exp(u_0)``, where ``u_0`` is learned.
        ``levels``: the upper levels, level 1 first (plain dicts of :class:`Level` fields).
        ``granularity``: ``"group"`` (one learned step size per group) or ``"tensor"``.
        ``retreat``: take back a step that made the loss rise along its direction.
        ``sharded``: the group's parameters are split over the ranks of the default
            process group (``ZeroRedundancyOptimizer``, FSDP2): reduce the dot products
            across ranks before deciding anything (see the module docstring). ``None``
            detects FSDP2 and warns on ranks that differ (:mod:`._rank_check`).
    """

    _rule: BaseRule

    def __init__(self, params: Any, defaults: dict[str, Any]) -> None:
        _check_lr(defaults["lr"])
        _check_horizon(defaults.get("horizon", 0.0))
        check_first_step_limit(defaults.get("first_step_limit"))
        check_growth_search(defaults.get("growth_search"))
        if defaults.get("granularity") not in GRANULARITIES:
            raise ValueError(f"Invalid granularity: {defaults.get('granularity')!r}; expected one of {GRANULARITIES}")
        defaults = dict(defaults)
        defaults["levels"] = _level_specs(defaults["levels"])
        if "hyper_level" in defaults:
            defaults["hyper_level"] = _level_spec(defaults["hyper_level"])
        self._rule = self._make_rule()
        super().__init__(params, defaults)

    def __setstate__(self, state: dict[str, Any]) -> None:
        super().__setstate__(state)
        self._rule = self._make_rule()  # not pickled by torch's Optimizer.__getstate__
        for group in self.param_groups:
            group.setdefault("retreat", True)
            group.setdefault("granularity", "group")
            group.setdefault("maximize", False)
            group.setdefault("horizon", _resume.missing_horizon(group))  # measured default, not 0
            group.setdefault("sharded", None)
            if _TOWER_KEY in group:
                for key in ("retreated", "peak_gmax"):
                    group[_TOWER_KEY].setdefault(key, torch.zeros_like(group[_TOWER_KEY]["step"]))
        _resume.normalize_steps(self.state, self.param_groups)  # a number as Adam's step: a tensor

    def _make_rule(self) -> BaseRule:
        """The base rule of this optimizer class (rebuilt after unpickling)."""
        raise NotImplementedError

    def __repr__(self) -> str:
        lines = [self.__class__.__name__ + " ("]
        for i, group in enumerate(self.param_groups):
            lines.append(f"Parameter Group {i}")
            for key in sorted(group):
                if key not in ("params", _TOWER_KEY, EFFECTIVE_LR_KEY):
                    lines.append(f"    {key}: {group[key]}")
        lines.append(")")
        return "\n".join(lines)

    def add_param_group(self, param_group: dict[str, Any]) -> None:
        param_group = dict(param_group)
        if "levels" in param_group:
            param_group["levels"] = _level_specs(param_group["levels"])
        if "hyper_level" in param_group:
            param_group["hyper_level"] = _level_spec(param_group["hyper_level"])
        if "lr" in param_group:
            _check_lr(param_group["lr"])
        if "horizon" in param_group:
            _check_horizon(param_group["horizon"])
        if "first_step_limit" in param_group:
            check_first_step_limit(param_group["first_step_limit"])
        if "growth_search" in param_group:
            check_growth_search(param_group["growth_search"])
        _check_sharded(
            param_group.get("sharded", self.defaults.get("sharded", False)),
            param_group.get("granularity", self.defaults.get("granularity")),
        )
        param_group.pop(_TOWER_KEY, None)  # learned state is never shared between groups
        super().add_param_group(param_group)

    def state_dict(self) -> dict[str, Any]:
        """torch's optimizer state dict; under FSDP2 each per-parameter buffer as a DTensor.

        The step keeps those buffers for this rank's shard as plain tensors. Handed out plain,
        the distributed checkpoint API would take them for replicated values (saving one rank's
        shard for all); wrapped like their parameter, they are saved, gathered and resharded as
        the parameters are. The wrappers share storage with the optimizer's buffers.
        """
        out = super().state_dict()
        params = [p for group in self.param_groups for p in group["params"]]
        for index, st in _resume.param_entries(out["state"], len(params)):  # hooks may add other keys
            p = params[index]
            if _is_dtensor(p):  # a new dict: the one torch hands out is the optimizer's own
                out["state"][index] = {k: _as_param_layout(v, p) for k, v in st.items()}
        return out

    def load_state_dict(self, state_dict: dict[str, Any]) -> None:
        state_dict = _resume.adopt_foreign_groups(  # a torch.optim checkpoint: tower options from here
            state_dict, self.param_groups, type(self).__name__, getattr(self._rule, "decoupled", None)
        )
        super().load_state_dict(state_dict)
        for group in self.param_groups:
            for p in group["params"]:  # FSDP2: back to this rank's shard as plain tensors
                if _is_dtensor(p) and p in self.state:
                    st = self.state[p]
                    st.update({k: _local_shard_of(v, p) for k, v in st.items() if _is_dtensor(v)})
            ts = group.get(_TOWER_KEY)
            if ts is not None and group["params"]:
                device = group["params"][0].device
                group[_TOWER_KEY] = {k: v.to(device) for k, v in ts.items()}
            eff = group.get(EFFECTIVE_LR_KEY)
            if isinstance(eff, Tensor) and group["params"]:
                group[EFFECTIVE_LR_KEY] = eff.to(group["params"][0].device)

    # ------------------------------------------------------------------ accessors

    def step_sizes(self) -> list[list[float]]:
        """Current step sizes per group, ``[a_0, a_1, ..., a_D]`` (``a_D`` is the fixed top).

        ``a_0`` includes the group's current ``lr`` factor. With ``granularity="tensor"``
        each level's value is the geometric mean over the group's tensors (see
        :meth:`step_size_tensors` for every value). Reads device memory: call it for
        logging, not inside a compiled region.
        """
        out = []
        for _group, sizes in zip(self.param_groups, self.step_size_tensors(), strict=True):
            out.append(
                [float(x) for x in sizes.log().mean(dim=0).exp()]
                if sizes.shape[0] > 1
                else [float(x) for x in sizes[0]]
            )
        return out

    def step_size_tensors(self) -> list[Tensor]:
        """Per group, a float64 tensor [units, D+1] of every step size (a copy)."""
        out = []
        for group in self.param_groups:
            levels = _levels_of(group)
            ts = group.get(_TOWER_KEY)
            if ts is None:
                ts = init_tower_state(levels, self._units(group, len(group["params"])), torch.device("cpu"))
            out.append(current_step_sizes(ts, levels, group["lr"]).cpu())
        return out

    def skipped_steps(self) -> int:
        """Steps skipped because a gradient (or its dot product) was not finite, over all groups."""
        return int(sum(float(g[_TOWER_KEY]["skipped"]) for g in self.param_groups if _TOWER_KEY in g))

    def hyperparameters(self) -> list[dict[str, float]]:
        """Per group, the learned momentum (``{"momentum": μ}``) or betas (``{"beta1", "beta2"}``).

        Empty dicts for groups that learn neither. Reads device memory: for logging.
        """
        out: list[dict[str, float]] = []
        for group in self.param_groups:
            ts = group.get(_TOWER_KEY)
            if ts is None or "hyper_value" not in ts:
                values = self._rule.hyper_initial(group)
            else:
                values = [float(x) for x in ts["hyper_value"]]
            names = ["momentum"] if group.get("learn_momentum") else ["beta1", "beta2"]
            out.append(dict(zip(names, values, strict=False)) if values else {})
        return out

    def retreats(self) -> int:
        """Steps taken back because the loss rose along them, over all groups."""
        return int(sum(float(g[_TOWER_KEY]["retreats"]) for g in self.param_groups if _TOWER_KEY in g))

    # ------------------------------------------------------------------ the step

    @staticmethod
    def _units(group: dict[str, Any], n_params: int) -> int:
        return n_params if group["granularity"] == "tensor" else 1

    def _tower_state(self, group: dict[str, Any], device: torch.device) -> dict[str, Tensor]:
        ts = group.get(_TOWER_KEY)
        if ts is None:
            ts = init_tower_state(_levels_of(group), self._units(group, len(group["params"])), device)
            hyper = self._rule.hyper_initial(group)
            if hyper:
                ts.update(init_hyper_state(hyper, device))
            group[_TOWER_KEY] = ts
        return ts

    @torch.no_grad()
    def step(self, closure: Callable[[], float] | None = None) -> Any:  # type: ignore[override]
        """Perform one optimization step; runs ``closure`` under grad first and returns its loss."""
        loss = None
        if closure is not None:
            with torch.enable_grad():
                loss = closure()
        _rank_check.check_once(self)  # once: do the ranks hold the same parameters? (unsharded groups)
        for group in self.param_groups:
            self._step_group(group)
        return loss

    def _step_group(self, group: dict[str, Any]) -> None:
        indexed = [(i, p) for i, p in enumerate(group["params"]) if p.grad is not None]
        sharded = _shards_across_ranks(group)
        if not indexed and not sharded:
            return
        for _, p in indexed:
            if p.grad.is_sparse:
                raise RuntimeError(f"{self.__class__.__name__} does not support sparse gradients")
            if torch.is_complex(p):
                raise RuntimeError(f"{self.__class__.__name__} does not support complex parameters")
        states = [self.state[p] for _, p in indexed]
        params, grads = _local_parts([p for _, p in indexed], sharded, self.__class__.__name__)
        levels = _levels_of(group)
        device = params[0].device if params else _local_device(group)
        ts = self._tower_state(group, device)
        learns_hyper = "hyper_value" in ts
        if not levels and not learns_hyper:
            self._plain_step(group, ts, params, grads, states, sharded)
            return

        units = ts["log_step"].shape[0]
        per_tensor = group["granularity"] == "tensor"
        unit_of = [i for i, _ in indexed] if per_tensor else [0] * len(params)
        unit_index = torch.tensor(unit_of, device=ts["step"].device) if per_tensor else None

        def per_unit(values: Iterable[Tensor]) -> Tensor:
            """Sum per-tensor values (float32 or float64; summed in float64) into the units."""
            listed = list(values)
            if not listed:
                return torch.zeros(units, dtype=torch.float64, device=ts["step"].device)
            if unit_index is None:  # one unit: the group
                return torch.stack(listed).double().sum().reshape(1)
            out = torch.zeros(units, dtype=torch.float64, device=unit_index.device)
            return out.index_add_(0, unit_index, torch.stack(listed).double())

        lr0 = torch.as_tensor(group["lr"], dtype=torch.float64, device=ts["step"].device).reshape(1)
        a_prev = ts["prev_step"][:, 0] if levels else ts.get("prev_lr", lr0).expand(units)
        horizon = float(group["horizon"])
        search_max_move = group.get("growth_search") if levels and "search" in ts else None
        if search_max_move is None:
            steps_taken, searching = int(ts["step"]), False
        else:  # one host read for both
            counters = torch.stack([ts["step"], (ts["search"] >= 0).any().to(ts["step"].dtype)]).tolist()
            steps_taken, searching = int(counters[0]), bool(counters[1])
        # The start-up test runs in the first steps and for as long as the growth search goes on.
        may_retreat = bool(group["retreat"]) and bool(levels) and (steps_taken < RETREAT_WINDOW or searching)
        exact = horizon == 0 or may_retreat or searching

        zero = torch.zeros((), dtype=torch.float64, device=ts["step"].device)
        dot_u = slope_u = torch.zeros(units, dtype=torch.float64, device=zero.device)
        tangent_dots = None
        if exact or learns_hyper:
            probes = [
                self._rule.probe(group, p, g, st, a_prev[u], exact=exact, slope=may_retreat or searching)
                for p, g, st, u in zip(params, grads, states, unit_of, strict=True)
            ]
            dot_u, slope_u = per_unit(pr[0] for pr in probes), per_unit(pr[1] for pr in probes)
            if learns_hyper:
                tangent_dots = (
                    torch.stack([torch.stack(pr[2]) for pr in probes]).double().sum(dim=0)
                    if probes
                    else torch.zeros_like(ts["hyper_value"])
                )
        trail_u = None
        if horizon > 0 and levels:
            # <g_s, D_{s-1}>: the gradient against the decaying trail of recent updates,
            # D = Σ_j γ^(s-1-j) Δ_j, kept as its moving average E = (1 - γ) D.
            fast = self._rule.trail_dot(group, params, grads, states)
            if fast is not None:  # the base's compiled read pass (one step size for the group)
                trail_u = fast.reshape(1).to(zero.device)
            else:
                # Each product in the tensors' precision, summed in float64 by per_unit (one cast).
                trail_dots = [
                    torch.dot(_chunks.flat(self._rule.loss_grad(group, p, g)), _chunks.flat(st["update_ema"]))
                    if "update_ema" in st
                    else zero
                    for p, g, st in zip(params, grads, states, strict=True)
                ]
                trail_u = per_unit(trail_dots)
        # The largest gradient entry is only needed by the growth guard (SGD).
        guard = bool(group["retreat"]) and bool(levels) and not self._rule.normalized
        gmax = _grad_max(grads) if guard else None
        # Every dot product contains a gradient, and inf * 0 = nan: a non-finite gradient shows in
        # them, except on a step where no dot product saw the gradient (no trail yet).
        local_finite = (
            torch.isfinite(gmax) if gmax is not None else torch.ones((), dtype=torch.bool, device=zero.device)
        )
        if not (exact or learns_hyper) and any("update_ema" not in st for st in states):
            local_finite = local_finite & _grads_finite(grads)
        if sharded:  # partial sums over this rank's parameters: complete them before deciding
            sums = [dot_u, slope_u, trail_u, tangent_dots]
            count, local_finite, reduced, gmax_all = _reduce_across_ranks(
                len(params), local_finite, sums, gmax, _shard_group(group["params"])
            )
            if count == 0:
                return  # no rank had a gradient in this group
            dot_u, slope_u = reduced[0], reduced[1]  # type: ignore[assignment]  # never None
            trail_u, tangent_dots = reduced[2], reduced[3]
            gmax = gmax_all
        hyper_dot = trail_u / (1.0 - horizon) if trail_u is not None else dot_u * a_prev
        checks = [hyper_dot, slope_u, dot_u] + [c for c in (gmax, tangent_dots) if c is not None]
        finite = local_finite & torch.isfinite(torch.cat([c.reshape(-1) for c in checks])).all()
        # The retreat tests, only where one can fire (each costs a few tiny tensor operations).
        retreat: Tensor | None = None
        secant: Tensor | None = None
        rho: Tensor | None = None
        growth: Tensor | None = None
        if may_retreat:  # start-up test: the loss rose along the last step (secant ratio rho)
            prev_slope = ts["prev_slope"].sum()
            rho = dot_u.sum() / prev_slope
            threshold = torch.where(ts["retreated"].bool(), -RETREAT_AGAIN_RATIO, -1.0)
            retreat = secant = (prev_slope > 0) & (rho < threshold)
        if gmax is not None:  # any time (SGD): the largest gradient entry grew RETREAT_GROWTH x
            growth = gmax / ts["peak_gmax"]
            blowup = (ts["peak_gmax"] > 0) & (growth > RETREAT_GROWTH)
            retreat = blowup if retreat is None else retreat | blowup
        if retreat is None:  # one host read per step either way
            skip_now, retreat_now = not bool(finite), False
        else:
            skip_now, retreat_now = torch.stack([~finite, retreat]).tolist()

        if skip_now:
            ts["skipped"] += 1
            return
        if retreat_now:
            # The secant minimizer along the step, or the growth guard's cut (a test that fired ran).
            if secant is not None and rho is not None and growth is not None:
                factor = torch.where(secant, 1.0 / (1.0 - rho), 1.0 / (1.0 + growth))
            elif rho is not None:  # only the start-up test ran
                factor = 1.0 / (1.0 - rho)
            elif growth is not None:  # only the growth guard ran
                factor = 1.0 / (1.0 + growth)
            self._retreat(group, ts, params, states, unit_of, a_prev, factor)
            return
        ts["retreated"].fill_(0)
        if tangent_dots is not None:
            hyper_step(ts, tangent_dots, a_prev.mean(), Level(**group["hyper_level"]))
            ts["prev_lr"] = lr0
        if levels:
            # Go on searching while the slope along the last step kept at least half its value.
            search_dot = dot_u - SEARCH_SLOPE_KEPT * ts["prev_slope"] if searching else None
            a0 = tower_step(ts, levels, hyper_dot, group["lr"], search_dot=search_dot, search_max_move=search_max_move)
        else:
            a0 = lr0.expand(units)
        limit = group.get("first_step_limit")  # absent in groups saved before the option existed
        if limit is not None and steps_taken == 0 and levels and self._rule.normalized:
            a0 = self._limit_first_step(group, ts, params, unit_of, a0, float(limit), sharded)
        _publish_effective_lr(group, a0)
        ts["prev_slope"].copy_(slope_u)
        if gmax is not None:
            torch.maximum(ts["peak_gmax"], gmax, out=ts["peak_gmax"])
        ts["step"] += 1
        self._advance(group, params, grads, states, unit_of, a0, horizon if levels else 0.0)

    def _limit_first_step(
        self,
        group: dict[str, Any],
        ts: dict[str, Tensor],
        params: list[Tensor],
        unit_of: list[int],
        a0: Tensor,
        limit: float,
        sharded: bool,
    ) -> Tensor:
        """``a_0 <- min(a_0, limit * typical weight size)`` before the first step (see :mod:`._first_step`)."""
        scale = typical_scale(
            params,
            unit_of,
            a0.shape[0],
            a0.device,
            reduce_group=_shard_group(group["params"]) if sharded else None,
            sharded=sharded,
            per_tensor_shards=any(_is_dtensor(p) for p in group["params"]),
        )
        cap = limit * scale
        over = (scale > 0) & (a0 > cap)
        ratio = torch.where(over, cap / torch.where(over, a0, 1.0), 1.0)
        ts["log_step"][:, 0] += ratio.log()
        ts["prev_step"][:, 0] *= ratio
        return a0 * ratio

    def _retreat(
        self,
        group: dict[str, Any],
        ts: dict[str, Tensor],
        params: list[Tensor],
        states: list[dict[str, Any]],
        unit_of: list[int],
        a_prev: Tensor,
        factor: Tensor,
    ) -> None:
        """Take the last step back and redo it with ``a_prev * factor`` (clipped); levels untouched."""
        factor = torch.clamp(factor, min=RETREAT_MIN_FACTOR, max=0.5)
        a_new = a_prev * factor
        for p, st, u in zip(params, states, unit_of, strict=True):
            self._rule.retreat(group, p, st, a_prev[u], a_new[u])
            if "update_ema" in st:  # the trail held the unstable steps: start it afresh
                st["update_ema"].zero_()
        ts["log_step"][:, 0] += factor.log()
        ts["prev_step"][:, 0] = a_new
        if "search" in ts:  # a step too large ends the growth search
            ts["search"].fill_(-1.0)
        ts["retreats"] += 1
        ts["retreated"].fill_(1)
        _publish_effective_lr(group, a_new)

    def _advance(
        self,
        group: dict[str, Any],
        params: list[Tensor],
        grads: list[Tensor],
        states: list[dict[str, Any]],
        unit_of: list[int],
        a0: Tensor,
        horizon: float,
    ) -> None:
        """The base update with step sizes ``a0`` [units], folding it into the trail when ``horizon > 0``."""
        if not params:  # a rank holding none of a sharded group's parameters
            return
        per_unit = [a0[u] for u in range(a0.shape[0])]  # one tensor per unit: one fused kernel call per unit
        step_sizes = [per_unit[u] for u in unit_of]
        if horizon == 0:
            self._rule.update(group, params, grads, states, step_sizes)
            return
        for p, st in zip(params, states, strict=True):
            if "update_ema" not in st:
                st["update_ema"] = torch.zeros_like(p, memory_format=torch.preserve_format)
        if a0.shape[0] == 1 and self._rule.update_with_trail(group, params, grads, states, a0[0], 1.0 - horizon):
            return
        _with_update_ema(
            [st["update_ema"] for st in states],
            params,
            1.0 - horizon,
            lambda: self._rule.update(group, params, grads, states, step_sizes),
        )

    def _plain_step(
        self,
        group: dict[str, Any],
        ts: dict[str, Tensor],
        params: list[Tensor],
        grads: list[Tensor],
        states: list[dict[str, Any]],
        sharded: bool = False,
    ) -> None:
        """Depth 0, nothing learned: the base optimizer itself, with non-finite steps skipped."""
        finite = _grads_finite(grads) if grads else torch.ones((), dtype=torch.bool)
        if sharded:
            count, finite, _, _ = _reduce_across_ranks(len(params), finite, [], None, _shard_group(group["params"]))
            if count == 0:
                return
        if not bool(finite):
            ts["skipped"] += 1
            return
        ts["step"] += 1
        _publish_effective_lr(
            group, torch.as_tensor(group["lr"], dtype=torch.float64, device=ts["step"].device).reshape(1)
        )
        self._rule.update(group, params, grads, states, [group["lr"]] * len(params))


def _shards_across_ranks(group: dict[str, Any]) -> bool:
    """Whether the group reduces across ranks: ``sharded=True``, or None with FSDP2 DTensors."""
    return _rank_check.reduces_across_ranks(group)


def _local_device(group: dict[str, Any]) -> torch.device:
    """Where a rank that holds none of the group's gradients keeps the group's tower state."""
    if not group["params"]:
        return torch.device("cpu")
    return _shard(group["params"][0]).device


def _local_parts(params: list[Tensor], sharded: bool, owner: str) -> tuple[list[Tensor], list[Tensor]]:
    """The parameters and gradients as plain tensors: this rank's shard of DTensors (FSDP2).

    The shard shares storage with the DTensor, so updating it in place updates the parameter.
    Per-parameter state is then kept for the shard only, as plain tensors, and the update
    (fused kernels included) runs on plain tensors.
    """
    grads: list[Tensor] = [p.grad for p in params]  # type: ignore[misc]  # callers keep p.grad is not None
    if not any(_is_dtensor(p) for p in params):
        return params, grads
    if not sharded:
        raise RuntimeError(
            f"{owner}: the parameters are DTensors (FSDP2) and their dot products are partial sums; "
            "pass sharded=True (with torch.distributed initialized) to reduce them across ranks"
        )
    return [_shard(p) for p in params], [_shard(g) for g in grads]


def _is_dtensor(t: Any) -> bool:
    return type(t).__name__ == "DTensor" and hasattr(t, "to_local")


def _shard(t: Tensor) -> Tensor:
    """This rank's part of a DTensor (a view of its storage); any other tensor as it is."""
    return t.to_local() if _is_dtensor(t) else t  # type: ignore[attr-defined, no-any-return]


def _as_param_layout(value: Any, p: Any) -> Any:
    """A buffer kept for the local shard of DTensor ``p``, as a DTensor laid out like ``p`` (same storage)."""
    if not isinstance(value, Tensor) or _is_dtensor(value) or value.dim() == 0 or value.shape != p.to_local().shape:
        return value  # e.g. the step count: the same on every rank
    from torch.distributed.tensor import DTensor

    return DTensor.from_local(value, p.device_mesh, p.placements, run_check=False, shape=p.shape, stride=p.stride())


def _local_shard_of(value: Any, p: Any) -> Tensor:
    """This rank's part of a loaded DTensor buffer, laid out like DTensor ``p`` first."""
    if tuple(value.placements) != tuple(p.placements) or value.device_mesh != p.device_mesh:
        value = value.redistribute(p.device_mesh, p.placements)
    return value.to_local()  # type: ignore[no-any-return]


def _shard_group(params: list[Tensor]) -> Any:
    """The process group over which a parameter group is sharded; None for the default group.

    FSDP2 parameters are DTensors: on a 1-D mesh the mesh's group; on a 2-D mesh that shards
    along one dimension and replicates along the other (HSDP), the group of the sharding
    dimension only, since replicas hold the same shard and summing over them would count each
    shard once per replica. Plain tensors (ZeroRedundancyOptimizer): the default group.
    """
    for p in params:
        if not _is_dtensor(p):
            continue
        mesh, placements = p.device_mesh, p.placements  # type: ignore[attr-defined]
        if mesh.ndim == 1:
            return mesh.get_group()
        shard_dims = [i for i, pl in enumerate(placements) if pl.is_shard()]
        if len(shard_dims) != 1 or not all(pl.is_replicate() for i, pl in enumerate(placements) if i != shard_dims[0]):
            raise RuntimeError(
                f"sharded=True supports DTensor parameters sharded along one mesh dimension (FSDP2, "
                f"HSDP); got placements {tuple(placements)} on a {mesh.ndim}-D mesh"
            )
        return mesh.get_group(shard_dims[0])
    return None


def _reduce_across_ranks(
    count: int, finite: Tensor, sums: list[Tensor | None], gmax: Tensor | None, group: Any = None
) -> tuple[int, Tensor, list[Tensor | None], Tensor | None]:
    """Complete this rank's partial values over ``group`` (default: the default process group).

    ``count`` (parameters with a gradient here), the flag ``not finite`` and every tensor of
    ``sums`` (``None`` entries are passed through) are packed into ONE float64 vector and
    all-reduced with SUM; ``gmax`` (the largest absolute gradient entry), when given, takes a
    second all-reduce with MAX. Returns the total count, whether every rank was finite, the
    summed tensors (in their shapes) and the global ``gmax``. Every rank gets bitwise the same
    values, so every rank then takes the same decisions.
    """
    device = finite.device
    present = [s for s in sums if s is not None]
    head = torch.stack([torch.tensor(float(count), dtype=torch.float64), (~finite).double().cpu()]).to(device)
    packed = torch.cat([head] + [s.reshape(-1).double().to(device) for s in present])
    dist.all_reduce(packed, op=dist.ReduceOp.SUM, group=group)
    out: list[Tensor | None] = []
    offset = 2
    for s in sums:
        if s is None:
            out.append(None)
            continue
        out.append(packed[offset : offset + s.numel()].reshape(s.shape).to(s.device))
        offset += s.numel()
    gmax_all = None
    if gmax is not None:
        gmax_all = gmax.detach().double().reshape(1).clone()
        dist.all_reduce(gmax_all, op=dist.ReduceOp.MAX, group=group)
        gmax_all = gmax_all.reshape(())
    return int(packed[0]), packed[1] == 0, out, gmax_all


def _publish_effective_lr(group: dict[str, Any], a0: Tensor) -> None:
    """Store the level-0 step size ``a0`` [units] under ``group[EFFECTIVE_LR_KEY]`` (a new 0-dim tensor)."""
    value = a0[0] if a0.shape[0] == 1 else a0.log().mean().exp()
    group[EFFECTIVE_LR_KEY] = value.detach().to(torch.float64).clone()


def _grad_max(grads: list[Tensor]) -> Tensor:
    """The largest absolute gradient entry (float64); inf or nan if any entry is. Never overflows.

    One ``aminmax`` pass per tensor (the max-abs norm kernel is ~15x slower on CPU).
    """
    extremes = [torch.stack(torch.aminmax(g)) for g in grads if g.numel()]
    if not extremes:  # no entries (or, on a rank holding none of a sharded group, no tensors)
        return torch.zeros((), dtype=torch.float64, device=grads[0].device if grads else None)
    return torch.stack(extremes).abs().max().double()


def _grads_finite(grads: list[Tensor]) -> Tensor:
    """Whether every gradient is finite."""
    return torch.isfinite(_grad_max(grads))


def _with_update_ema(emas: list[Tensor], params: list[Tensor], weight: float, move: Callable[[], None]) -> None:
    """Run ``move`` and fold the update it makes into ``E <- (1 - weight) E + weight (w_before - w_after)``.

    Two passes: ``E <- lerp(E, w_before, weight)``, then ``E <- E - weight w_after``.
    """
    torch._foreach_lerp_(emas, params, weight)
    move()
    torch._foreach_add_(emas, params, alpha=-weight)
