"""Compose a tower by name: any base with any stack of levels."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

from .adam import TowerAdam, TowerAdamW
from .levels import Level
from .sgd import TowerSGD
from .tower import TowerOptimizer

__all__ = ["BASES", "make_tower"]

BASES: dict[str, Callable[..., TowerOptimizer]] = {"sgd": TowerSGD, "adam": TowerAdam, "adamw": TowerAdamW}


def make_tower(
    params: Any,
    base: str = "adam",
    levels: Sequence[Level | str | dict[str, Any]] | int | None = None,
    **base_kwargs: Any,
) -> TowerOptimizer:
    """Build a tower from a base name and its levels.

    Args:
        params: parameters or parameter groups.
        base: level 0, one of ``"sgd"``, ``"adam"``, ``"adamw"``.
        levels: level 1 first: :class:`Level` objects or kind names (``"adam"``,
            ``"sgd"``), or an int depth of default levels; None gives the defaults.
        **base_kwargs: the base's own arguments (``lr``, ``momentum``, ``betas``, ...).

    Example::

        opt = make_tower(model.parameters(), "sgd", [Level("adam", lr=0.05), "sgd"],
                         lr=0.1, momentum=0.9)
    """
    if base not in BASES:
        raise ValueError(f"Invalid base: {base!r}; expected one of {', '.join(map(repr, BASES))}")
    if isinstance(levels, int) and not isinstance(levels, bool):
        return BASES[base](params, depth=levels, **base_kwargs)
    return BASES[base](params, levels=levels, **base_kwargs)
