"""What the engine asks of a base (level 0): :class:`BaseRule`, and :class:`CompiledTrail` where a base has one."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any, NamedTuple, Protocol, TypeGuard, runtime_checkable

from torch import Tensor

__all__ = [
    "BaseRule",
    "CompiledTrail",
    "NativeProbe",
    "Probe",
    "TrailProbe",
    "has_native_probe",
    "has_trail_kernels",
    "has_trail_probe",
]


class Probe(NamedTuple):
    """The dot products of one tensor's new gradient ``g_s`` with the base's directions.

    ``prev_dot``: ``<g_s, d_{0,s-1}>`` (0 without a previous direction, or when not asked for);
    ``slope``: ``<g_s, d_{0,s}>``, the direction this step would take (0 when not asked for);
    ``tangent_dots``: ``<g_s, T_j>`` for each learned hyperparameter, ``T_j = ∂d_{0,s-1}/∂θ_j``.
    """

    prev_dot: Tensor
    slope: Tensor
    tangent_dots: list[Tensor]


class BaseRule(Protocol):
    """Level 0: the direction ``d_0`` and the weight update of one base optimizer.

    ``learned`` is the float64 tensor of the hyperparameters the group learns (momentum, or
    the betas; :mod:`stepsize_tower.hyperparams`), or None: then the group's own values hold.
    """

    #: True when the update is normalized (about ``a_0`` per coordinate whatever the gradient's
    #: size, as in Adam): a growing gradient then does not make a growing update.
    normalized: bool

    def learned_initial(self, group: dict[str, Any]) -> list[float]:
        """Initial values of the hyperparameters in (0, 1) this group learns (usually none)."""
        ...

    def loss_grad(self, group: dict[str, Any], p: Tensor, grad: Tensor) -> Tensor:
        """The gradient of the minimized loss (``maximize`` and L2 decay applied)."""
        ...

    def probe(
        self,
        group: dict[str, Any],
        learned: Tensor | None,
        p: Tensor,
        grad: Tensor,
        state: dict[str, Any],
        a_prev: Tensor,
        *,
        exact: bool,
        slope: bool,
    ) -> Probe:
        """The dot products of one tensor (see :class:`Probe`); reads only.

        ``prev_dot`` is needed only when ``exact``, ``slope`` only when ``slope``.
        """
        ...

    def update(
        self,
        group: dict[str, Any],
        learned: Tensor | None,
        params: list[Tensor],
        grads: list[Tensor],
        states: list[dict[str, Any]],
        step_sizes: Sequence[Tensor | float],
        skip: Tensor | None = None,
    ) -> None:
        """Move every weight one step with its step size ``a_0``.

        ``skip``: a 0-dim bool tensor; where it holds, nothing changes (weights and state), with
        no host read (:mod:`stepsize_tower.bases.masking`).
        """
        ...

    def torch_update(
        self, group: dict[str, Any], params: list[Tensor], grads: list[Tensor], states: list[dict[str, Any]]
    ) -> None:
        """Depth 0, nothing learned: the update of the ``torch.optim`` optimizer itself, with ``group["lr"]``."""
        ...

    def retreat(
        self,
        group: dict[str, Any],
        learned: Tensor | None,
        p: Tensor,
        state: dict[str, Any],
        a_prev: Tensor,
        a_new: Tensor,
    ) -> None:
        """Move the weight back along its last direction: ``w <- w + (a_prev - a_new) d_{0,s-1}``."""
        ...


@runtime_checkable
class CompiledTrail(Protocol):
    """A base with kernels of its own for the trail (:mod:`stepsize_tower.trail`)."""

    def trail_dot(
        self,
        group: dict[str, Any],
        params: list[Tensor],
        grads: list[Tensor],
        trails: list[Tensor],
    ) -> Tensor | None:
        """``Σ <g_s, E>`` over the whole group from the base's kernel, or None where it does not apply."""
        ...

    def update_with_trail(
        self,
        group: dict[str, Any],
        params: list[Tensor],
        grads: list[Tensor],
        states: list[dict[str, Any]],
        trails: list[Tensor],
        a0: Tensor,
        weight: float,
        with_dot: bool = False,
    ) -> tuple[bool, Tensor | None]:
        """The update with one step size ``a0`` and ``E <- (1 - weight) E + weight Δ`` in one kernel.

        Returns whether it applied and, with ``with_dot``, ``Σ <g~, E>`` of the trails before
        the update (0-dim float64; the lagged hypergradient, :mod:`stepsize_tower.lag`)."""
        ...

    def pass_takes_dot(self, group: dict[str, Any], params: list[Tensor], grads: list[Tensor]) -> bool:
        """Whether :meth:`update_with_trail` takes ``Σ <g~, E>`` inside its update pass (no read pass)."""
        ...


@runtime_checkable
class NativeProbe(Protocol):
    """A base whose previous-direction dot product and largest gradient entry come from one native pass."""

    def native_probe(
        self, group: dict[str, Any], params: list[Tensor], grads: list[Tensor], states: list[dict[str, Any]]
    ) -> tuple[Tensor, Tensor] | None:
        """``(Σ <g_s, d_{0,s-1}>, max |g_s|)`` over the whole group, or None where it does not apply."""
        ...


@runtime_checkable
class TrailProbe(Protocol):
    """A base whose trail dot product and largest gradient entry come from one native pass."""

    def trail_probe(
        self, group: dict[str, Any], params: list[Tensor], grads: list[Tensor], trails: list[Tensor]
    ) -> tuple[Tensor, Tensor] | None:
        """``(Σ <g_s, E>, max |g_s|)`` over the whole group, or None where it does not apply."""
        ...


#: (class, protocol) -> whether the class implements it, decided once: a runtime protocol
#: check scans the protocol's attributes each time (about 15 µs, several times per step).
_IMPLEMENTS: dict[tuple[type, type], bool] = {}


def _implements(rule: object, protocol: type) -> bool:
    key = (type(rule), protocol)
    if key not in _IMPLEMENTS:
        _IMPLEMENTS[key] = isinstance(rule, protocol)
    return _IMPLEMENTS[key]


def has_trail_kernels(rule: object) -> TypeGuard[CompiledTrail]:
    """``isinstance(rule, CompiledTrail)``, decided once per class."""
    return _implements(rule, CompiledTrail)


def has_native_probe(rule: object) -> TypeGuard[NativeProbe]:
    """``isinstance(rule, NativeProbe)``, decided once per class."""
    return _implements(rule, NativeProbe)


def has_trail_probe(rule: object) -> TypeGuard[TrailProbe]:
    """``isinstance(rule, TrailProbe)``, decided once per class."""
    return _implements(rule, TrailProbe)
