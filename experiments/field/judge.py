"""The yardstick: the best tuned baseline per task, base and seed, and the normalized gap.

A run is GOOD when ``L ≤ L_best + GAP · (L_init − L_best)``: within 5 % of the way from the
initial loss to the best tuned baseline (fixed rate or warm-up + cosine) of the same base.
``L`` is the final training loss (mean of the last 5 % of steps); a diverged run is not good.
"""

from __future__ import annotations

import math
import statistics
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

from .methods import BASELINE_METHODS, FIXED
from .points import Record

GAP = 0.05
#: The tower's final step size should never end more than this factor below the best fixed rate.
RATIO_FLOOR = 1.0 / 30.0


def loss_of(r: Record) -> float:
    """The final training loss, ``inf`` for a diverged run."""
    return math.inf if r.get("final_loss") is None else float(r["final_loss"])


@dataclass(frozen=True)
class Best:
    """The best tuned baseline of one task, base and seed."""

    loss: float
    held_out: float
    method: str
    lr: float
    initial: float
    best_fixed_lr: float
    best_fixed_loss: float

    def threshold(self) -> float:
        """The largest final loss that is GOOD."""
        return self.loss + GAP * (self.initial - self.loss)

    def log_threshold(self) -> float:
        """The same gap on log losses: ``L ≤ L_best · (L_init / L_best)^GAP``.

        A secondary view for losses that start orders of magnitude above their optimum
        (least squares on raw features), where 5 % of the linear gap accepts anything.
        """
        return self.loss * (self.initial / self.loss) ** GAP if self.loss > 0 else math.nan


def best_baselines(records: Iterable[Record]) -> dict[tuple[str, str, int], Best]:
    """Per (task, base, seed): the lowest final training loss over the baseline methods."""
    groups: dict[tuple[str, str, int], list[Record]] = {}
    for r in records:
        if r["method"] in BASELINE_METHODS:
            groups.setdefault((r["task"], r["base"], r["seed"]), []).append(r)
    out = {}
    for key, rs in groups.items():
        best = min(rs, key=loss_of)
        fixed = [r for r in rs if r["method"] == FIXED]
        best_fixed = min(fixed, key=loss_of) if fixed else best
        inits = [float(r["initial_loss"]) for r in rs if r.get("initial_loss") is not None]
        out[key] = Best(
            loss=loss_of(best),
            held_out=math.inf if best.get("held_out_loss") is None else float(best["held_out_loss"]),
            method=best["method"],
            lr=float(best["lr"]),
            initial=statistics.median(inits),
            best_fixed_lr=float(best_fixed["lr"]),
            best_fixed_loss=loss_of(best_fixed),
        )
    return out


def is_good(r: Record, best: dict[tuple[str, str, int], Best]) -> bool | None:
    """Whether a run is within the gap of its baseline (None when no baseline ran yet)."""
    b = best.get((r["task"], r["base"], r["seed"]))
    if b is None or not math.isfinite(b.loss):
        return None
    return loss_of(r) <= b.threshold()


def is_good_log(r: Record, best: dict[tuple[str, str, int], Best]) -> bool | None:
    """Whether a run is within the gap of its baseline measured on log losses."""
    b = best.get((r["task"], r["base"], r["seed"]))
    if b is None or not math.isfinite(b.loss):
        return None
    return loss_of(r) <= b.log_threshold()


def gap_fraction(r: Record, best: dict[tuple[str, str, int], Best]) -> float:
    """``(L − L_best) / (L_init − L_best)``: 0 at the best baseline, 1 at the initial loss."""
    b = best.get((r["task"], r["base"], r["seed"]))
    if b is None:
        return math.nan
    return (loss_of(r) - b.loss) / (b.initial - b.loss)


def step_ratio(r: Record, best: dict[tuple[str, str, int], Best]) -> float:
    """The run's final step size ÷ the best fixed rate of its task, base and seed."""
    b = best.get((r["task"], r["base"], r["seed"]))
    return math.nan if b is None else float(r["final_step_size"]) / b.best_fixed_lr


def median_finite(xs: Sequence[float]) -> float:
    """Median counting non-finite values as worst (``inf``)."""
    vals = [x if math.isfinite(x) else math.inf for x in xs]
    return statistics.median_high(vals) if vals else math.nan
