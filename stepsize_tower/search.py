"""The growth search: a start-up bracket for a step size typed far too small (``growth_search=c_max``).

A step size far too small grows by about ``a_1`` per step in log space, so from 1e-7 it
needs a few hundred steps to become useful. While every step so far has passed the
search's test (:func:`keeps_searching`: the loss still falls along the last step at least
:data:`SEARCH_SLOPE_KEPT` as fast as when the step began; a one-step test, which does not
lag like the trail), level 1's move on ``u_0`` becomes an exponential search::

    u_{0,s} = u_{0,s-1} - c_s,   c_s = min(c, max(ρ^n c, -c_max))   when c < 0 (growth)

with ``c = a_1 d_1`` the level's own move, ``ρ = SEARCH_SPEEDUP`` and ``n`` the steps
searched so far. The first step that fails the test (or a retreat) ends the search for
good, and level 1's first moment restarts from that step's hypergradient (it holds the
search's growth, which would otherwise carry ``a_0`` on past the point the test found).
From then on the levels alone move ``u_0``. Like the retreats, the search is not part of
the differentiated update: the hypergradients of levels above 1 use ``a_1`` unboosted.

State: ``tower["search"]`` [U], the steps searched so far, or -1 once the search has ended.
"""

from __future__ import annotations

import math

from torch import Tensor

__all__ = ["SEARCH_SLOPE_KEPT", "SEARCH_SPEEDUP", "keeps_searching", "searched_move"]

#: The boost on level 1's move grows by this factor per searched step.
SEARCH_SPEEDUP = 1.1

#: The search goes on while ``<g_s, d_{s-1}> > SEARCH_SLOPE_KEPT <g_{s-1}, d_{s-1}>``: the loss
#: still falls along the last step at this fraction of the rate at which the step began. On a
#: quadratic, steps up to half the line minimizer along ``d``; with 0 (the slope's sign alone) a
#: quadratic with curvatures 0.1 ... 1 was searched up to a = 4.5 > 2/L and blew up (measured).
SEARCH_SLOPE_KEPT = 0.5

#: Bound on ``n log ρ`` of the boost ``ρ^n`` (keeps it finite in float64).
MAX_LOG_BOOST = 200.0

LOG_SPEEDUP = math.log(SEARCH_SPEEDUP)


def keeps_searching(slope_now: Tensor, slope_before: Tensor) -> Tensor:
    """The search's test per unit as a margin (> 0: go on).

    ``<g_s, d_{s-1}> - SEARCH_SLOPE_KEPT <g_{s-1}, d_{s-1}>``.
    """
    return slope_now - SEARCH_SLOPE_KEPT * slope_before


def searched_move(change: float, boost: float, max_move: float) -> float:
    """Level 1's move ``change`` on ``u_0`` under the search's ``boost`` (growth only; Python floats)."""
    if change >= 0 or boost <= 1.0:
        return change
    return min(change, max(change * boost, -max_move))
