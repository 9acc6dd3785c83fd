"""Loading checkpoints the tower did not write itself, or wrote in an older form.

Three cases, each a pure function the optimizer calls from ``load_state_dict`` /
``__setstate__`` / ``state_dict``:

* **A ``torch.optim`` checkpoint** (``SGD``, ``Adam``, ``AdamW``): its parameter groups carry
  the base's hyperparameters but none of the tower's options (``levels`` first of all), and
  its per-parameter state uses the same names as ours (``momentum_buffer``; ``step``,
  ``exp_avg``, ``exp_avg_sq``). :func:`adopt_foreign_groups` completes each group with the
  tower options this optimizer was constructed with; the base's state is then adopted as it
  is, and the tower starts fresh at the checkpoint's ``lr`` (``u_0 = 0``). A checkpoint of a
  different base (or AMSGrad, whose extra moment the tower has no use for) is refused.
* **An older tower checkpoint** whose groups lack ``horizon``: :func:`missing_horizon` is the
  class's measured default for that group (:func:`stepsize_tower.defaults.default_horizon`),
  as for a group constructed today without the option.
* **A number as Adam's ``step``** (older or hand-edited checkpoints): :func:`normalize_steps`
  turns it into a 0-dim float32 tensor, as ``torch.optim.Adam.__setstate__`` does.

:func:`param_entries` lists only the entries of a state dict's ``state`` that belong to
parameters: ``torch.optim`` keeps keys that hooks add beside them (any hashable).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import torch

from .horizon import Horizon
from .options import default_horizon

__all__ = ["adopt_foreign_groups", "missing_horizon", "normalize_steps", "param_entries"]

#: Group keys that ``torch.optim`` saves and that are the base's own hyperparameters: a
#: checkpoint group must carry every one of them that this optimizer's groups have.
BASE_KEYS = ("lr", "betas", "eps", "weight_decay", "momentum", "dampening", "nesterov")

#: Keys of the tower's own that a checkpoint group never supplies to another: learned state.
_NEVER_ADOPTED = ("params", "param_names", "tower", "effective_lr")

#: ``torch.optim`` options with no counterpart here; dropped once their value is checked.
_TORCH_ONLY = ("amsgrad", "foreach", "capturable", "differentiable", "decoupled_weight_decay")


def is_foreign(saved_group: Mapping[str, Any]) -> bool:
    """Whether a checkpoint group was written by a ``torch.optim`` optimizer (no tower levels)."""
    return "levels" not in saved_group


def adopt_foreign_groups(
    state_dict: dict[str, Any], own_groups: Sequence[Mapping[str, Any]], owner: str, decoupled: bool | None
) -> dict[str, Any]:
    """``state_dict`` with each ``torch.optim`` group completed by this optimizer's options.

    Keys the checkpoint group has win (``lr``, ``betas``, ``momentum``, ... and a scheduler's
    ``initial_lr``); every key it lacks is taken from the optimizer's own group at the same
    position (``levels``, ``horizon``, ``granularity``, ...). ``decoupled`` is whether the
    optimizer decays weights as AdamW does (None for bases without the distinction). Tower
    checkpoints pass through unchanged; a shallow copy is returned, the input is not changed.

    Raises:
        ValueError: the checkpoint was written by another base (a key of :data:`BASE_KEYS`
            is missing), by Adam with ``amsgrad=True``, or by Adam with weight decay where
            AdamW is loading it (or the reverse).
    """
    saved = state_dict.get("param_groups")
    if not isinstance(saved, list) or not any(isinstance(g, Mapping) and is_foreign(g) for g in saved):
        return state_dict
    groups = []
    for i, group in enumerate(saved):
        if i >= len(own_groups) or not is_foreign(group):  # torch reports a count mismatch itself
            groups.append(group)
            continue
        _check_same_base(group, own_groups[i], i, owner, decoupled)
        own = own_groups[i]
        adopted = {k: v for k, v in group.items() if k not in _TORCH_ONLY or k in own}
        adopted.update({k: v for k, v in own.items() if k not in adopted and k not in _NEVER_ADOPTED})
        groups.append(adopted)
    return {**state_dict, "param_groups": groups}


def _check_same_base(
    group: Mapping[str, Any], own: Mapping[str, Any], index: int, owner: str, decoupled: bool | None
) -> None:
    where = f"{owner}.load_state_dict: parameter group {index} of the checkpoint"
    missing = [k for k in BASE_KEYS if k in own and k not in group]
    if missing:
        raise ValueError(
            f"{where} has no tower options and no {missing}: it was not written by {owner} or the "
            "torch.optim optimizer it extends; load it into the optimizer class that wrote it"
        )
    if group.get("amsgrad"):
        raise ValueError(
            f"{where} was written with amsgrad=True, which {owner} does not implement; "
            "resume it with torch.optim, or start the tower from a checkpoint without AMSGrad"
        )
    saved_decoupled = group.get("decoupled_weight_decay")
    differs = decoupled is not None and saved_decoupled is not None and bool(saved_decoupled) != decoupled
    if differs and group.get("weight_decay", 0) != 0:  # without decay Adam and AdamW are one rule
        wanted, written = ("TowerAdamW", "AdamW") if saved_decoupled else ("TowerAdam", "Adam")
        raise ValueError(
            f"{where} was written by torch.optim.{written} (decoupled_weight_decay={bool(saved_decoupled)}); "
            f"load it into {wanted}, whose weight decay is the same"
        )


def missing_horizon(group: Mapping[str, Any]) -> Horizon:
    """The horizon a group saved without one gets: the class's measured default for that group.

    SGD groups get :data:`DEFAULT_HORIZON`; Adam groups, which carry ``betas``,
    :data:`DEFAULT_ADAM_HORIZON`.
    """
    return default_horizon(adam_like="betas" in group)


def normalize_steps(state: Mapping[Any, Any], groups: Sequence[Mapping[str, Any]]) -> None:
    """In place: a per-parameter ``step`` held as a number becomes a 0-dim float32 tensor.

    ``torch.optim.Adam`` converts it the same way when it loads one (``float(step)``); ours
    lives on the parameter's device, where the tower's own steps are created.
    """
    for group in groups:
        for p in group["params"]:
            st = state.get(p)
            if isinstance(st, dict) and "step" in st and not isinstance(st["step"], torch.Tensor):
                st["step"] = torch.tensor(float(st["step"]), dtype=torch.float32, device=p.device)


def param_entries(state: Mapping[Any, Any], n_params: int) -> list[tuple[int, dict[str, Any]]]:
    """The ``(index, per-parameter state)`` pairs of a packed state dict's ``state``.

    Leaves out what hooks may add beside them (``register_state_dict_pre_hook`` writing into
    ``optimizer.state``, post hooks writing into the dict): keys that are not parameter
    indices, or values that are not dicts.
    """
    return [
        (k, v)
        for k, v in state.items()
        if isinstance(k, int) and not isinstance(k, bool) and 0 <= k < n_params and isinstance(v, dict)
    ]
