"""What the host knows about a group's progress without reading the device.

How many steps a group has taken, and whether its growth search goes on, decide what a
step does (:func:`stepsize_tower.plan.make_plan`): the start-up test, the clipping check and
the first-step limit run only early. Reading them from the device every step would stall an
accelerator's launch queue, so the host keeps a mirror of them:

* during the start-up window the mirror is exact: the step's one read (the skip/retreat
  decision) also tells whether the step was taken and whether the search goes on;
* once ``steps_taken >= RETREAT_WINDOW`` and no unit searches, the group is *settled*: no
  later step depends on the count (it only grows, the search never restarts), so the host
  stops following it and the step reads nothing (skips become masked updates).

The mirror is keyed by the group's step-count tensor itself (weakly): a state loaded from a
checkpoint brings a new tensor, whose count is then read once.
"""

from __future__ import annotations

import weakref
from dataclasses import dataclass

import torch
from torch import Tensor

from .safeguards import RETREAT_WINDOW

__all__ = ["Clock", "clock_of", "start_clock"]


@dataclass
class Clock:
    """The host's mirror of one group's progress."""

    #: Steps taken (skips and retreats excluded): exact until settled, then a lower bound.
    steps_taken: int
    #: Whether some unit still runs the growth search.
    searching: bool
    #: The largest ``group["lr"]`` (a float) of the taken steps, 0 before the first: a step whose
    #: ``lr`` is above it is "rising" (a warm-up), and Adam-like bases cap it like a first step.
    #: Once settled, every step's ``lr`` counts (whether it was taken is not read).
    peak_lr: float = 0.0
    #: The ``peak_lr`` stored in the tower state (``schedule_anneal.keep_peak``), 0 if none.
    peak_kept: float = 0.0

    @property
    def settled(self) -> bool:
        """No later step depends on the count: the step reads nothing from the device."""
        return self.steps_taken >= RETREAT_WINDOW and not self.searching

    def advance(self, taken: bool, searching: bool, lr: float | None = None) -> None:
        """Record a step's outcome (known from its one read)."""
        if taken:
            self.steps_taken += 1
            self.raise_peak(lr)
        self.searching = searching

    def raise_peak(self, lr: float | None) -> None:
        """``peak_lr <- max(peak_lr, lr)`` (``None``: a tensor ``lr``, not followed)."""
        if lr is not None and lr > self.peak_lr:
            self.peak_lr = lr


#: ``id(step tensor) -> (weak reference to it, mirror)``. Not a ``WeakKeyDictionary``: its
#: lookups compare keys with ``==``, which for tensors is an elementwise op and a host read.
_CLOCKS: dict[int, tuple[weakref.ref[Tensor], Clock]] = {}


def _keep(step: Tensor, clock: Clock) -> Clock:
    key = id(step)
    _CLOCKS[key] = (weakref.ref(step, lambda _: _CLOCKS.pop(key, None)), clock)
    return clock


def _lookup(step: Tensor) -> Clock | None:
    entry = _CLOCKS.get(id(step))
    if entry is None or entry[0]() is not step:
        return None
    return entry[1]


def start_clock(ts: dict[str, Tensor], search_on: bool) -> Clock:
    """The mirror of a group state created in this process (nothing taken yet: no read).

    ``search_on``: the group runs the growth search (its option is set and it has levels).
    """
    return _keep(ts["step"], Clock(steps_taken=0, searching=search_on and "search" in ts))


#: Tower-state key of the largest ``lr``, kept once a schedule lowered it (``schedule_anneal``).
PEAK_LR_KEY = "peak_lr"


def clock_of(ts: dict[str, Tensor], search_on: bool, lr: float | None = None) -> Clock:
    """The group's mirror; read from the device once for a state this process did not create."""
    clock = _lookup(ts["step"])
    if clock is None:
        searching = (ts["search"] >= 0).any() if search_on and "search" in ts else torch.zeros((), dtype=torch.bool)
        kept = ts.get(PEAK_LR_KEY, torch.zeros((), dtype=torch.float64))
        step, search, peak = torch.stack(
            [ts["step"].double(), searching.to(ts["step"].device).double(), kept.to(ts["step"].device).double()]
        ).tolist()
        clock = Clock(steps_taken=int(step), searching=bool(search), peak_lr=peak, peak_kept=peak)
        if clock.steps_taken > 0:  # resumed: the lr in effect, or the peak a schedule lowered it from
            clock.raise_peak(lr)
        _keep(ts["step"], clock)
    return clock
