"""The defaults a user gets by typing only ``lr``: chosen from measurements, not taste.

The evidence is the sensitivity benchmark (``experiments/sensitivity.py``) whose table is
in the README. Change these only together with a fresh run of it.
"""

from __future__ import annotations

from .levels import Level

__all__ = [
    "DEFAULT_DEPTH",
    "DEFAULT_FIRST_STEP_LIMIT",
    "DEFAULT_HORIZON",
    "DEFAULT_HYPER_LEVEL",
    "default_horizon",
    "default_levels",
]

#: Levels above the base when neither ``depth`` nor ``levels`` is given.
DEFAULT_DEPTH = 1

#: Decay γ of the trail of updates the level-0 hypergradient is taken against (0 = one step
#: back, the published rule). A one-step hypergradient under minibatch noise prefers step
#: sizes that are too small (short-horizon bias); a trail of about 1 / (1 - γ) updates lets
#: oscillations cancel and measures whether the net recent movement still goes downhill.
#: Used for Adam/AdamW and for SGD without momentum.
DEFAULT_HORIZON = 0.99


def default_horizon(momentum: float = 0.0) -> float:
    """The measured default horizon: :data:`DEFAULT_HORIZON`, or 0 for SGD with momentum.

    A momentum buffer is itself a trail of about ``1 / (1 - μ)`` gradients; stacking a second
    trail on it made the step size shrink (heavy ball, μ = 0.9, on a quadratic and on the
    digits MLP), while the one-step rule beat the best fixed rate there (see README).
    """
    return 0.0 if momentum > 0 else DEFAULT_HORIZON


#: Adam-like bases: the first step moves weights by at most this many times their typical
#: size (geometric mean over tensors of their root-mean-square entry; see
#: :mod:`stepsize_tower._first_step`). Measured on the sensitivity benchmark (Adam, 5 tasks,
#: seed 0): without it 32/45 good points, with limit 1, 0.5 or 0.25 35/45 (logistic regression
#: and the GRU language model typed at lr 1 and 10 rescued, nothing lost); limit 2 and the
#: group's plain root-mean-square (dominated by the GRU's embedding table) did not rescue the
#: GRU. 0.5 rather than 1: on a small tanh network started at lr 10 or 100 a limit of 1 ended
#: 10x worse than 0.5 or none (tests/test_safeguards.py). Three seeds: see the README.
DEFAULT_FIRST_STEP_LIMIT = 0.5

#: The level that learns momentum or betas when asked to (logit space, fixed step size).
DEFAULT_HYPER_LEVEL = Level(kind="adam", lr=0.01)

#: Top-level step size of a level stack, by depth (index = depth).
_TOP_LR = {1: 0.05, 2: 0.01}


def default_levels(depth: int) -> tuple[Level, ...]:
    """The default stack of ``depth`` levels: Adam-like levels in log space.

    Level 1's step size (``~0.05``) means ``log a_0`` moves by at most about 5 % per
    step: a step size 1e-7 too small grows to a useful one in a few hundred steps. Levels
    above start from the same value and the top one is smaller, since it is fixed.
    """
    if depth == 0:
        return ()
    top = _TOP_LR.get(depth, 0.01)
    lower = _TOP_LR[1]
    return (*tuple(Level(kind="adam", lr=lower) for _ in range(depth - 1)), Level(kind="adam", lr=top))
