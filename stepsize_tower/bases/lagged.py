r"""The one-step-lagged hypergradient of the native kernel (``TowerAdam(native="lagged")``).

The exact step reads the gradients and trails once for :math:`h_s = \langle g_s, E_{s-1}\rangle`
(it decides the step size :math:`a_s`), then updates: 44 bytes per float32 parameter. The
lagged step takes :math:`h_s` inside step :math:`s`'s update pass instead and uses it for the
step size of step :math:`s+1`, in place of :math:`h_{s+1}`: 36 bytes, plus a 4-byte read of the
gradients that keeps a non-finite gradient from going unseen (the exact dot product contains
the current gradient; the lagged one does not).

The value is kept per group, keyed weakly by the first tensor's trail together with that
trail's version counter after the kernel wrote it: a trail changed since (cleared by a
retreat, updated by the default path, loaded from a checkpoint) has another version or is
another tensor, and the exact dot product is taken instead.
"""

from __future__ import annotations

import weakref

from torch import Tensor

__all__ = ["recall", "remember"]

#: ``id(trail) -> (weak reference to it, its version after the kernel, h)``.
_KEPT: dict[int, tuple[weakref.ref[Tensor], int, Tensor]] = {}


def remember(trail: Tensor, h: Tensor) -> None:
    """Keep ``h`` (taken in the update pass that just wrote ``trail``) for the next step."""
    key = id(trail)
    if key not in _KEPT:
        ref = weakref.ref(trail, lambda _: _KEPT.pop(key, None))
    else:
        ref = _KEPT[key][0]
    _KEPT[key] = (ref, trail._version, h)


def recall(trail: Tensor) -> Tensor | None:
    """The kept ``h`` if ``trail`` is the tensor it was taken with and unchanged since; else None."""
    kept = _KEPT.get(id(trail))
    if kept is None or kept[0]() is not trail or kept[1] != trail._version:
        return None
    return kept[2]
