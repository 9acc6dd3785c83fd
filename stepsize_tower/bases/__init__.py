"""Level 0 of a tower: each base optimizer's direction and weight update, behind one protocol.

``protocol`` (what the engine asks of a base), ``grad`` (the loss gradient, once),
``sgd`` / ``adam`` (the rules; Adam's arithmetic once in ``adam_math``), ``fused`` (torch's
fused kernels, where valid), ``compiled`` (the opt-in compiled Adam + trail kernels),
``chunks`` / ``buffers`` (flat views, float64 dot products, persistent buffers).
"""

from .adam import AdamRule
from .grad import loss_grad
from .protocol import (
    BaseRule,
    CompiledTrail,
    NativeProbe,
    Probe,
    TrailProbe,
    has_native_probe,
    has_trail_kernels,
    has_trail_probe,
)
from .sgd import SGDRule

__all__ = [
    "AdamRule",
    "BaseRule",
    "CompiledTrail",
    "NativeProbe",
    "Probe",
    "SGDRule",
    "TrailProbe",
    "has_native_probe",
    "has_trail_kernels",
    "has_trail_probe",
    "loss_grad",
]
