"""TowerOptimizer: the ``torch.optim.Optimizer`` every tower optimizer is.

A base (level 0, :class:`~stepsize_tower.bases.BaseRule`) moves the weights and takes dot
products of a new gradient with its directions; the levels (:mod:`stepsize_tower.levels`)
turn those into new step sizes. This class holds the options (:mod:`stepsize_tower.options`),
the state and its checkpoints, and the accessors; :func:`stepsize_tower.engine.step_group`
is the step.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable
from typing import Any, ClassVar

import torch
from torch import Tensor
from torch.optim import Optimizer

from . import _rank_check, _resume, distributed
from .bases import BaseRule
from .engine import step_group
from .group_state import EFFECTIVE_LR_KEY, TOWER_KEY, levels_of, units_of
from .levels import Level, current_step_sizes, init_tower_state
from .options import (
    TOWER_OPTIONS,
    Option,
    args_doc,
    check_defaults,
    check_group,
    fill_missing,
    level_spec,
    resolve_levels,
)

__all__ = ["EFFECTIVE_LR_KEY", "TowerOptimizer"]

_TOWER_KEY = TOWER_KEY


def _level_specs(levels: Iterable[Level | dict[str, Any]]) -> list[dict[str, Any]]:
    return [level_spec(lv) for lv in levels]


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
            across ranks before deciding anything (see the module docstring).
    """

    _rule: BaseRule
    #: This class's options (:mod:`stepsize_tower.options`): checks, docs, legacy values.
    _options: ClassVar[tuple[Option, ...]] = TOWER_OPTIONS

    def __init_subclass__(cls, **kwargs: Any) -> None:
        super().__init_subclass__(**kwargs)
        if cls.__doc__ and "{args}" in cls.__doc__:
            cls.__doc__ = cls.__doc__.replace("{args}", args_doc(cls._options, cls.__init__))

    def __init__(self, params: Any, defaults: dict[str, Any]) -> None:
        check_defaults(self._options, defaults)
        defaults = dict(defaults)
        defaults["levels"] = _level_specs(defaults["levels"])
        if "hyper_level" in defaults:
            defaults["hyper_level"] = level_spec(defaults["hyper_level"])
        self._rule = self._make_rule()
        super().__init__(params, defaults)

    def __setstate__(self, state: dict[str, Any]) -> None:
        super().__setstate__(state)
        self._rule = self._make_rule()  # not pickled by torch's Optimizer.__getstate__
        for group in self.param_groups:
            fill_missing(self._options, group)
            if _TOWER_KEY in group:
                for key in ("retreated", "peak_gmax"):
                    group[_TOWER_KEY].setdefault(key, torch.zeros_like(group[_TOWER_KEY]["step"]))
        _resume.normalize_steps(self.state, self.param_groups)

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
        if "levels" in param_group or "depth" in param_group:  # a group's own depth or levels
            levels = resolve_levels(param_group.pop("depth", None), param_group.get("levels"))
            param_group["levels"] = _level_specs(levels)
        if "hyper_level" in param_group:
            param_group["hyper_level"] = level_spec(param_group["hyper_level"])
        check_group(self._options, param_group, self.defaults)
        params = param_group["params"]
        param_group["params"] = params = [params] if isinstance(params, Tensor) else params
        if not isinstance(params, set):  # torch rejects a set: its order is not stable
            param_group["params"] = params = list(params)
            self._check_params(params)
        param_group.pop(_TOWER_KEY, None)  # learned state is never shared between groups
        super().add_param_group(param_group)

    def _check_params(self, params: list[Any]) -> None:
        """Refuse what the step cannot update (complex or sparse tensors) before it is added."""
        for p in params:
            if isinstance(p, Tensor) and torch.is_complex(p):
                raise ValueError(
                    f"{self.__class__.__name__} does not support complex parameters (got {p.dtype}); "
                    "optimize torch.view_as_real(p) of a real parameter instead"
                )
            if isinstance(p, Tensor) and p.layout != torch.strided:
                raise ValueError(f"{self.__class__.__name__} does not support sparse parameters (layout {p.layout})")

    def state_dict(self) -> dict[str, Any]:
        """torch's optimizer state dict; under FSDP2 each per-parameter buffer as a DTensor.

        The step keeps those buffers for this rank's shard as plain tensors. Handed out plain,
        the distributed checkpoint API would take them for replicated values (saving one rank's
        shard for all); wrapped like their parameter, they are saved, gathered and resharded as
        the parameters are. The wrappers share storage with the optimizer's buffers.
        """
        out = super().state_dict()
        params = [p for group in self.param_groups for p in group["params"]]
        for index, st in _resume.param_entries(out["state"], len(params)):
            p = params[index]
            if distributed.is_dtensor(p):  # a new dict: the one torch hands out is the optimizer's own
                out["state"][index] = {k: distributed.as_param_layout(v, p) for k, v in st.items()}
        return out

    def load_state_dict(self, state_dict: dict[str, Any]) -> None:
        state_dict = _resume.adopt_foreign_groups(
            state_dict, self.param_groups, type(self).__name__, getattr(self._rule, "decoupled", None)
        )
        super().load_state_dict(state_dict)
        for group in self.param_groups:
            for p in group["params"]:  # FSDP2: back to this rank's shard as plain tensors
                if distributed.is_dtensor(p) and p in self.state:
                    st = self.state[p]
                    st.update({k: distributed.local_shard_of(v, p) for k, v in st.items() if distributed.is_dtensor(v)})
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
            levels = levels_of(group)
            ts = group.get(_TOWER_KEY)
            if ts is None:
                ts = init_tower_state(levels, units_of(group), torch.device("cpu"))
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
                values = self._rule.learned_initial(group)
            else:
                values = [float(x) for x in ts["hyper_value"]]
            names = ["momentum"] if group.get("learn_momentum") else ["beta1", "beta2"]
            out.append(dict(zip(names, values, strict=False)) if values else {})
        return out

    def retreats(self) -> int:
        """Steps taken back because the loss rose along them, over all groups."""
        return int(sum(float(g[_TOWER_KEY]["retreats"]) for g in self.param_groups if _TOWER_KEY in g))

    # ------------------------------------------------------------------ the step

    @torch.no_grad()
    def step(self, closure: Callable[[], float] | None = None) -> Any:  # type: ignore[override]
        """Perform one optimization step; runs ``closure`` under grad first and returns its loss."""
        loss = None
        if closure is not None:
            with torch.enable_grad():
                loss = closure()
        _rank_check.check_once(self)
        for group in self.param_groups:
            step_group(self._rule, group, self.state, self.__class__.__name__)
        return loss
