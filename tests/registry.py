"""One table of optimizer configurations that drives the generic tests.

Each entry is ``(name, factory, description)``: ``factory(params)`` builds the optimizer.
Between them the entries cover every base (SGD plain / momentum / Nesterov / weight
decay, Adam, AdamW), depths 0..3, both level kinds, both granularities and the fused and
unfused Adam update.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any, NamedTuple

import pytest
from torch.optim import Optimizer

from stepsize_tower import Level, TowerAdam, TowerAdamW, TowerSGD, make_tower


class Config(NamedTuple):
    name: str
    factory: Callable[[Any], Optimizer]
    description: str


CONFIGS: list[Config] = [
    # --- SGD base
    Config("sgd_depth0", lambda p: TowerSGD(p, lr=0.05, depth=0), "plain fixed-rate SGD (no levels)"),
    Config("sgd", lambda p: TowerSGD(p, lr=0.01), "SGD with the default tower"),
    Config("sgd_momentum", lambda p: TowerSGD(p, lr=0.01, momentum=0.9), "heavy-ball momentum"),
    Config(
        "sgd_nesterov",
        lambda p: TowerSGD(p, lr=0.01, momentum=0.9, nesterov=True, depth=2),
        "Nesterov momentum, two default levels",
    ),
    Config(
        "sgd_weight_decay_dampening",
        lambda p: TowerSGD(p, lr=0.01, momentum=0.5, dampening=0.1, weight_decay=1e-2),
        "momentum with dampening and L2 weight decay",
    ),
    Config("sgd_sgd_level", lambda p: TowerSGD(p, lr=0.01, levels=["sgd"]), "one plain-descent level"),
    Config(
        "sgd_depth3_mixed",
        lambda p: TowerSGD(p, lr=0.01, momentum=0.9, levels=[Level("adam", lr=0.05), "sgd", Level("adam", lr=0.01)]),
        "three levels of mixed kinds",
    ),
    Config(
        "sgd_tensor",
        lambda p: TowerSGD(p, lr=0.01, momentum=0.9, granularity="tensor"),
        "one learned step size per tensor",
    ),
    Config(
        "sgd_make_tower_depth2",
        lambda p: make_tower(p, "sgd", 2, lr=0.01, weight_decay=1e-3),
        "make_tower by name, depth 2",
    ),
    Config(
        "sgd_learn_momentum",
        lambda p: TowerSGD(p, lr=0.01, momentum=0.5, learn_momentum=True),
        "momentum learned online as well",
    ),
    # --- Adam base
    Config("adam_depth0", lambda p: TowerAdam(p, lr=0.01, depth=0), "plain fixed-rate Adam (no levels)"),
    Config("adam", lambda p: TowerAdam(p, lr=0.01), "Adam with the default tower (fused where possible)"),
    Config("adam_unfused", lambda p: TowerAdam(p, lr=0.01, fused=False), "Adam, reference (unfused) update"),
    Config("adam_fused", lambda p: TowerAdam(p, lr=0.01, fused=True), "Adam, torch's fused kernel"),
    Config(
        "adam_depth2_weight_decay",
        lambda p: TowerAdam(p, lr=0.01, depth=2, weight_decay=1e-2, fused=False),
        "Adam with L2 weight decay, two levels",
    ),
    Config(
        "adam_depth3_tensor",
        lambda p: TowerAdam(p, lr=0.01, depth=3, granularity="tensor", fused=True),
        "three levels, one step size per tensor, fused",
    ),
    Config(
        "adam_sgd_levels",
        lambda p: make_tower(p, "adam", [Level("sgd", lr=0.01), "sgd"], lr=0.01, fused=False),
        "two plain-descent levels",
    ),
    Config(
        "adam_learn_betas",
        lambda p: TowerAdam(p, lr=0.01, learn_betas=True),
        "betas learned online as well",
    ),
    # --- AdamW base
    Config("adamw", lambda p: TowerAdamW(p, lr=0.01), "AdamW (decoupled decay 1e-2) with the default tower"),
    Config(
        "adamw_unfused_tensor_depth2",
        lambda p: TowerAdamW(p, lr=0.01, weight_decay=0.1, depth=2, granularity="tensor", fused=False),
        "AdamW, unfused, per-tensor step sizes, two levels",
    ),
]

BY_NAME = {c.name: c for c in CONFIGS}


def parametrize_configs(argname: str = "config", configs: list[Config] | None = None) -> Any:
    """``pytest.mark.parametrize`` over registry entries, with their names as test ids."""
    configs = CONFIGS if configs is None else configs
    return pytest.mark.parametrize(argname, configs, ids=[c.name for c in configs])
