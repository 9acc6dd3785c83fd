"""When a final result counts as good: the normalized-gap rule (default) and the ratio band.

Both rules compare a run's final loss ``L`` with ``L_best``, the best fixed-rate result of
the same seed (and swept options) on the same metric:

- **normalized gap** (``tolerance: {gap: 0.05}``, the default): good when

  .. math:: L \\le L_{best} + \\mathrm{gap} \\cdot \\max(L_{init} - L_{best},\\ 0)

  where ``L_init`` is the same metric of the seed's model before its first step. The run
  must close all but ``gap`` of the way from the initial loss to the best baseline; a run
  whose baseline never improved on ``L_init`` must match ``L_best`` itself.
- **ratio band** (``tolerance: {ratio: 1.25, slack: 0.01}``): good when
  ``L ≤ max(ratio × L_best, L_best + slack)``.

A loss of a few nats that a baseline takes far below its start makes the ratio band wide
(1.25 × 6.7 allows +1.7 nats); the gap scales with the progress the baseline made instead.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

__all__ = ["DEFAULT_GAP", "DEFAULT_RATIO", "DEFAULT_SLACK", "GoodRule"]

#: The default share of the way from the initial loss to the best baseline a run may stay short.
DEFAULT_GAP = 0.05
#: The ratio band's defaults, used when a recipe gives ``ratio`` or ``slack``.
DEFAULT_RATIO = 1.25
DEFAULT_SLACK = 0.01


@dataclass(frozen=True)
class GoodRule:
    """One of the two rules (see the module docstring) with its numbers.

    Attributes:
        kind: ``gap`` or ``ratio``.
        gap: the normalized gap (``gap`` rule).
        ratio: the ratio to the best (``ratio`` rule).
        slack: the absolute slack over the best (``ratio`` rule).
    """

    kind: Literal["gap", "ratio"] = "gap"
    gap: float = DEFAULT_GAP
    ratio: float = DEFAULT_RATIO
    slack: float = DEFAULT_SLACK

    def threshold(self, best: float, initial: float | None) -> float:
        """The largest good final value, given the best baseline and the initial value.

        ``nan`` when the gap rule has no finite initial value (it cannot judge then).
        """
        if self.kind == "ratio":
            return max(self.ratio * best, best + self.slack)
        if initial is None or not math.isfinite(initial):
            return math.nan
        return best + self.gap * max(initial - best, 0.0)

    def good(self, value: float | None, best: float, initial: float | None) -> bool:
        """Whether a final ``value`` is good; a missing or non-finite value never is."""
        if value is None or not (math.isfinite(value) and math.isfinite(best)):
            return False
        return value <= self.threshold(best, initial)

    def formula(self) -> str:
        """The rule with its numbers, such as ``L ≤ L_best + 0.05 × (L_init − L_best)``."""
        if self.kind == "ratio":
            return f"L ≤ max({self.ratio:g} × L_best, L_best + {self.slack:g})"
        return f"L ≤ L_best + {self.gap:g} × (L_init − L_best)"

    def describe(self, metric: str) -> str:
        """One sentence for reports: which rule, its numbers and what ``L_best``/``L_init`` are."""
        if self.kind == "ratio":
            return (
                f"A result is good when its final {metric} L ≤ max({self.ratio:g} × L_best, L_best + {self.slack:g}) "
                f"(ratio band), L_best being the best fixed-rate final {metric} of the same seed."
            )
        return (
            f"A result is good when its final {metric} L ≤ L_best + {self.gap:g} × (L_init − L_best) "
            f"(normalized gap: within {100 * self.gap:g} % of the way from the initial {metric} to the best), "
            f"L_best being the best fixed-rate final {metric} of the same seed and L_init the {metric} "
            "of that seed's model before its first step."
        )
