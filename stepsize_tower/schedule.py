"""A learned step-size trajectory as a file and as a ``torch.optim.lr_scheduler`` that replays it.

A :class:`LearnedSchedule` holds, per parameter group, one level-0 step size per call of
``optimizer.step()`` and what that call did (``"taken"``, ``"skipped"``, ``"retreat"``).
Record one with :class:`stepsize_tower.log_hook.StepSizeLogger` and take it away::

    schedule = logger.schedule()
    schedule.save("learned_schedule.json")
    ...
    optimizer = torch.optim.SGD(model.parameters(), lr=0.0)        # any lr: replaced
    scheduler = LearnedSchedule.load("learned_schedule.json").scheduler(optimizer)
    for batch in batches:
        ...; optimizer.step(); scheduler.step()

What is replayed: entry ``i`` is the net step size of call ``i``, the one its weight move
ends up with. A retreat takes the previous step back and redoes it with a smaller step size:
the previous entry is overwritten with that step size and the retreat's own entry is 0 (it
adds no move of its own). A skipped call moved nothing: its entry is 0. Replaying on a plain
``torch.optim.SGD`` (no momentum) with the same data and seed reproduces the tower's weights
to float tolerance, retreats included; with momentum it does only for runs without retreats
or skips (torch's momentum buffer would absorb the discarded gradient), and for Adam it does
only for runs without them either. With ``granularity="tensor"`` a group's entry is the
geometric mean of its tensors' step sizes, so the replay is an approximation.

File format (JSON, ``"format": "stepsize_tower/learned-schedule"``, ``"version": 1``)::

    {"format": ..., "version": 1, "level": 0,
     "groups": [{"step_sizes": [a_0 per call ...], "status": ["taken" | "skipped" | "retreat", ...]}],
     "meta": {...}}
"""

from __future__ import annotations

import json
import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from torch.optim import Optimizer
from torch.optim.lr_scheduler import LRScheduler

__all__ = ["FORMAT", "STATUSES", "LearnedSchedule", "ReplaySchedule"]

FORMAT = "stepsize_tower/learned-schedule"
_VERSION = 1

#: What one call of ``optimizer.step()`` did to a group.
STATUSES = ("taken", "skipped", "retreat")


@dataclass(frozen=True)
class LearnedSchedule:
    """Per group, the net level-0 step size of every ``optimizer.step()`` call (see the module doc).

    Attributes:
        step_sizes: ``step_sizes[g][i]``, group ``g``, call ``i`` (0-based).
        status: ``status[g][i]`` in :data:`STATUSES`.
        meta: free-form JSON-able information (optimizer class, seed, ...).
    """

    step_sizes: tuple[tuple[float, ...], ...]
    status: tuple[tuple[str, ...], ...]
    meta: dict[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        if len(self.step_sizes) != len(self.status):
            raise ValueError("step_sizes and status need one entry per group")
        for g, (sizes, status) in enumerate(zip(self.step_sizes, self.status, strict=True)):
            if len(sizes) != len(status):
                raise ValueError(f"group {g}: {len(sizes)} step sizes but {len(status)} statuses")
            bad = [s for s in status if s not in STATUSES]
            if bad:
                raise ValueError(f"group {g}: unknown status {bad[0]!r}; expected one of {STATUSES}")
            if not all(math.isfinite(a) and a >= 0 for a in sizes):
                raise ValueError(f"group {g}: step sizes must be finite and >= 0")

    @property
    def steps(self) -> int:
        """The number of recorded ``optimizer.step()`` calls."""
        return len(self.step_sizes[0]) if self.step_sizes else 0

    @property
    def all_taken(self) -> bool:
        """True when no call was skipped or retreated: the replay is exact for any SGD."""
        return all(s == "taken" for status in self.status for s in status)

    def to_dict(self) -> dict[str, Any]:
        """The JSON document written by :meth:`save`."""
        return {
            "format": FORMAT,
            "version": _VERSION,
            "level": 0,
            "groups": [
                {"step_sizes": list(sizes), "status": list(status)}
                for sizes, status in zip(self.step_sizes, self.status, strict=True)
            ],
            "meta": self.meta,
        }

    @classmethod
    def from_dict(cls, doc: dict[str, Any]) -> LearnedSchedule:
        """Read the document written by :meth:`to_dict`; raises ``ValueError`` on another format."""
        if doc.get("format") != FORMAT or doc.get("version") != _VERSION:
            raise ValueError(f"not a {FORMAT} version {_VERSION} document: {doc.get('format')!r}")
        groups = doc["groups"]
        return cls(
            step_sizes=tuple(tuple(float(a) for a in g["step_sizes"]) for g in groups),
            status=tuple(tuple(str(s) for s in g["status"]) for g in groups),
            meta=dict(doc.get("meta", {})),
        )

    def save(self, path: str | Path) -> Path:
        """Write the schedule as JSON (full float precision); returns the path."""
        path = Path(path)
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(json.dumps(self.to_dict(), indent=1) + "\n")
        return path

    @classmethod
    def load(cls, path: str | Path) -> LearnedSchedule:
        """Read a schedule written by :meth:`save`."""
        return cls.from_dict(json.loads(Path(path).read_text()))

    def scheduler(self, optimizer: Optimizer, *, last_epoch: int = -1) -> ReplaySchedule:
        """A scheduler that sets ``group["lr"]`` of ``optimizer`` to this trajectory, call by call."""
        return ReplaySchedule(optimizer, self, last_epoch=last_epoch)


class ReplaySchedule(LRScheduler):
    """Replay a :class:`LearnedSchedule` on any optimizer: before call ``i`` of ``step()``, ``lr = step_sizes[g][i]``.

    Step it once after every ``optimizer.step()``, as any scheduler. The optimizer needs as many
    parameter groups as the schedule (or the schedule one group, used for every group). After
    the recorded calls it holds the last non-zero step size.
    """

    def __init__(self, optimizer: Optimizer, schedule: LearnedSchedule, last_epoch: int = -1) -> None:
        n = len(optimizer.param_groups)
        if schedule.steps == 0:
            raise ValueError("the schedule has no recorded steps")
        if len(schedule.step_sizes) not in (1, n):
            raise ValueError(f"the schedule has {len(schedule.step_sizes)} groups, the optimizer {n}")
        sizes: Sequence[tuple[float, ...]] = schedule.step_sizes
        self.trajectory: list[list[float]] = [list(sizes[0 if len(sizes) == 1 else g]) for g in range(n)]
        self.hold: list[float] = [next((a for a in reversed(t) if a > 0), 0.0) for t in self.trajectory]
        super().__init__(optimizer, last_epoch)

    def get_lr(self) -> list[float]:  # type: ignore[override]
        """The step size of call ``last_epoch`` (0-based) per group."""
        i = self.last_epoch
        return [t[i] if i < len(t) else h for t, h in zip(self.trajectory, self.hold, strict=True)]
