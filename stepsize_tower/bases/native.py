r"""Native CPU kernels (C++, built on first use) of the tower's step: the default on the CPU.

:func:`trail_dot` and :func:`adam_trail_update` are the step of ``TowerAdam`` / ``TowerAdamW``
on CPU (``native=None``, the default, or True: :meth:`stepsize_tower.bases.adam.AdamRule.trail_dot`
/ ``update_with_trail``), with the same math as :mod:`stepsize_tower.bases.compiled`;
:func:`dot_and_max` is the read pass of ``TowerSGD`` (against the momentum buffer at horizon
0, :meth:`stepsize_tower.bases.sgd.SGDRule.native_probe`; against the trail otherwise,
``trail_probe``) and :func:`sgd_trail_update` its update with the trail (``update_with_trail``,
math in its docstring). Adam, per parameter tensor (float32 or float64; moments and trail in
the same dtype): weights :math:`w`, gradient :math:`g`, moments
:math:`m, v`, trail :math:`E`, trail weight :math:`\omega`, step count :math:`t` (already
incremented), step size :math:`a`, weight decay :math:`\lambda`:

.. math::
    \begin{aligned}
    &\tilde g = \pm g \;(+\,\lambda w \text{ for L2 decay, Adam}), \qquad
     m' = m + (1-\beta_1)(\tilde g - m), \qquad v' = \beta_2 v + (1-\beta_2)\tilde g^2 \\
    &u = \frac{a}{1-\beta_1^t}\cdot\frac{m'}{\sqrt{v'}/\sqrt{1-\beta_2^t} + \epsilon}, \qquad
     \Delta = u \;(+\,a\lambda w \text{ for AdamW}) \\
    &w' = w - u \;(\text{AdamW: } w' = w(1-a\lambda) - u), \qquad
     E' = (1-\omega) E + \omega \Delta, \qquad
     h = \sum_{\text{tensors}} \langle \tilde g, E \rangle
    \end{aligned}

The scalars :math:`a/(1-\beta_1^t)`, :math:`\sqrt{1-\beta_2^t}`, :math:`a\lambda` are computed
in float64 and rounded once to the tensors' dtype; every element operation runs in that dtype.
The moment updates are multiply-adds, fused where the ISA has them (as torch's own ``lerp``):
for a float32 gradient below 1e-19 a separate :math:`\tilde g^2` would be subnormal, and
subnormal results slowed the step 2x on this machine's CPU (an MLP trained on one batch).
:math:`h` takes exact products (float32 x float32 in float64) summed in float64: each tensor is
cut into blocks of :math:`2^{15}` elements, each block summed in a fixed order, and the block
sums added in block order, so :math:`h` does not depend on the number of threads. The update
runs the blocks on ``at::parallel_for`` (torch's thread count), vectorized with
``at::vec::Vectorized``.

Build: ``torch.utils.cpp_extension.load`` compiles ``native_kernels.cpp`` on the first call
(tens of seconds, never at import) into torch's extensions directory
(``TORCH_EXTENSIONS_DIR`` or ``~/.cache/torch_extensions``), under a name that hashes the
source, the flags and the torch version, so later processes load it in milliseconds. Flags:
``-O3`` and, where torch itself runs its AVX2 kernels on this CPU, ``-mavx2 -mfma`` (the ISA
is part of the name, so a cache shared by different CPUs never loads a binary a CPU lacks);
``-ffp-contract=off`` keeps every other multiply and add rounded as written. It needs a C++
compiler and ``ninja`` (the ``ninja`` wheel beside the Python executable is found too). Where
either is missing, or the build fails, or ``STEPSIZE_TOWER_NATIVE=0`` (:data:`ENV_SWITCH`),
:func:`available` is False, one notice is logged, and the optimizer takes its default path.
"""

from __future__ import annotations

import hashlib
import logging
import os
import shutil
import sys
from collections.abc import Sequence
from pathlib import Path
from types import ModuleType

import torch
from torch import Tensor

__all__ = [
    "ENV_SWITCH",
    "adam_trail_update",
    "all_finite",
    "applies",
    "available",
    "dot_and_max",
    "largest",
    "reset",
    "sgd_trail_update",
    "trail_dot",
]

#: Environment variable: set to "0" to never build or use the native kernels.
ENV_SWITCH = "STEPSIZE_TOWER_NATIVE"

_SOURCE = Path(__file__).with_name("native_kernels.cpp")
_log = logging.getLogger(__name__)

_module: ModuleType | None = None
_decided = False


def available() -> bool:
    """Whether the native kernels can run: built (or loaded from the cache) on the first call.

    False, with one logged notice per process, under ``STEPSIZE_TOWER_NATIVE=0``, without a
    C++ compiler or ``ninja``, or when the build fails.
    """
    global _module, _decided
    if not _decided:
        _decided = True
        _module = _build()
    return _module is not None


def reset() -> None:
    """Forget the decision (for tests): the next :func:`available` decides (and logs) again."""
    global _module, _decided
    _module, _decided = None, False


#: The dtypes the kernels take (every tensor of a call in one of them).
DTYPES = (torch.float32, torch.float64)


def applies(params: Sequence[Tensor], *others: Sequence[Tensor]) -> bool:
    """Whether the kernels take these tensor lists, and (built on the first such call) can run.

    Every tensor dense, contiguous, on the CPU, real, of one dtype in :data:`DTYPES`, and
    ``others[k][i]`` shaped like ``params[i]``. Anything else (16-bit or complex parameters,
    sparse gradients, CUDA tensors, mixed dtypes) takes the default path. The per-tensor checks
    run in C++ (microseconds for a model's tensors; in Python they cost a tenth of a step at 1M
    parameters in 30 tensors).
    """
    if not params or params[0].dtype not in DTYPES or params[0].device.type != "cpu":
        return False
    if any(len(seq) != len(params) for seq in others) or not available():
        return False
    return bool(_kernels().compatible(list(params), [list(seq) for seq in others]))


def _isa_flags() -> tuple[str, list[str]]:
    capability = torch.backends.cpu.get_cpu_capability()
    if capability in ("AVX2", "AVX512"):
        return "avx2", ["-mavx2", "-mfma", "-DCPU_CAPABILITY_AVX2"]
    return "base", []


def _ninja_dir() -> str | None:
    """Where ``ninja`` is: on PATH, or beside the Python executable (the ``ninja`` wheel in a venv)."""
    if shutil.which("ninja"):
        return None
    here = Path(sys.executable).parent
    return str(here) if (here / "ninja").exists() else None


def _build() -> ModuleType | None:
    if os.environ.get(ENV_SWITCH, "1") == "0":
        _log.info("stepsize_tower: native kernels off (%s=0); using the default path", ENV_SWITCH)
        return None
    if shutil.which(os.environ.get("CXX", "c++")) is None:
        _log.warning("stepsize_tower: no C++ compiler found; native kernels off, using the default path")
        return None
    isa, flags = _isa_flags()
    flags = ["-O3", "-ffp-contract=off", *flags]
    key = hashlib.sha256((_SOURCE.read_text() + " ".join(flags) + torch.__version__).encode()).hexdigest()[:12]
    extra_dir = _ninja_dir()
    old_path = os.environ.get("PATH", "")
    try:
        if extra_dir:
            os.environ["PATH"] = extra_dir + os.pathsep + old_path
        from torch.utils import cpp_extension

        return cpp_extension.load(  # type: ignore[no-any-return]
            name=f"stepsize_tower_native_{isa}_{key}",
            sources=[str(_SOURCE)],
            extra_cflags=[*flags, "-fopenmp"],
            extra_ldflags=["-fopenmp"],
            verbose=False,
        )
    except Exception as exc:  # no ninja, a compiler error, a failed load: all mean "default path"
        _log.warning(
            "stepsize_tower: building the native kernels failed (%s: %s); using the default path",
            type(exc).__name__,
            _first_error(str(exc)),
        )
        return None
    finally:
        os.environ["PATH"] = old_path


def _first_error(text: str) -> str:
    """The compiler's first error line in a build log, else its last line."""
    lines = [ln.strip() for ln in text.strip().splitlines() if ln.strip()]
    errors = [ln for ln in lines if "error" in ln.lower() and not ln.startswith("ninja:")]
    return (errors or lines or [""])[0 if errors else -1][:300]


def _kernels() -> ModuleType:
    if not available() or _module is None:
        raise RuntimeError(f"the native kernels are not available (see the log; {ENV_SWITCH}=0 turns them off)")
    return _module


def _l2_params(params: Sequence[Tensor] | None, l2: float) -> list[Tensor]:
    """The weights a read pass needs for L2 decay ``l2`` (none without it)."""
    if l2 != 0 and params is None:
        raise ValueError("L2 weight decay needs params")
    return list(params) if params is not None else []


def trail_dot(
    grads: Sequence[Tensor],
    trails: Sequence[Tensor],
    *,
    params: Sequence[Tensor] | None = None,
    weight_decay: float = 0.0,
    decoupled: bool = True,
    maximize: bool = False,
) -> Tensor:
    r"""``Σ_i <g̃_i, E_i>`` as a 0-dim float64 tensor, in one read pass (``g̃`` as in the module docstring).

    ``params`` is needed for L2 decay (``decoupled=False`` and ``weight_decay != 0``).
    Dense contiguous float32/float64 CPU tensors of one dtype; anything else raises.
    """
    grads, trails = list(grads), list(trails)
    if not grads:
        return torch.zeros((), dtype=torch.float64)
    l2 = float(weight_decay) if not decoupled else 0.0
    return _kernels().trail_dot(grads, trails, _l2_params(params, l2), l2, bool(maximize))  # type: ignore[no-any-return]


def dot_and_max(
    grads: Sequence[Tensor],
    others: Sequence[Tensor],
    *,
    params: Sequence[Tensor] | None = None,
    weight_decay: float = 0.0,
    maximize: bool = False,
) -> tuple[Tensor, Tensor]:
    r"""``(Σ_i <g̃_i, B_i>, max_i |g_i|)`` as 0-dim float64 tensors, in one read pass.

    ``g̃ = ±g + λ w`` (L2 decay ``weight_decay``, which needs ``params``); the largest entry is
    of the raw gradients, NaN if any entry is NaN (inf if one is infinite). TowerSGD with
    momentum: ``B`` is the momentum buffer, and this is its hypergradient and its blow-up
    guard's measure. Same tensor requirements as :func:`trail_dot`.
    """
    grads, others = list(grads), list(others)
    if not grads:
        zero = torch.zeros((), dtype=torch.float64)
        return zero, zero.clone()
    l2 = float(weight_decay)
    dot, largest = _kernels().dot_and_max(grads, others, _l2_params(params, l2), l2, bool(maximize))
    return torch.tensor(dot, dtype=torch.float64), torch.tensor(largest, dtype=torch.float64)


def largest(tensors: Sequence[Tensor]) -> Tensor:
    """``max |x|`` over every entry (0-dim float64; NaN if any entry is NaN): one read pass."""
    tensors = list(tensors)
    return torch.tensor(_kernels().largest(tensors) if tensors else 0.0, dtype=torch.float64)


def all_finite(tensors: Sequence[Tensor]) -> bool:
    """Whether every entry of the tensors is finite: one read pass (same tensor requirements)."""
    tensors = list(tensors)
    return bool(_kernels().all_finite(tensors)) if tensors else True


def adam_trail_update(
    params: Sequence[Tensor],
    grads: Sequence[Tensor],
    exp_avgs: Sequence[Tensor],
    exp_avg_sqs: Sequence[Tensor],
    trails: Sequence[Tensor],
    steps: Sequence[Tensor | float],
    a: Tensor | float,
    beta1: float,
    beta2: float,
    eps: float,
    weight_decay: float,
    decoupled: bool,
    maximize: bool,
    trail_weight: float,
    with_dot: bool = False,
    increment_steps: bool = False,
) -> Tensor | None:
    r"""One Adam/AdamW step with step size ``a`` and the trail update, in one pass, in place.

    ``steps``: per-tensor step counts (one-element CPU tensors, or floats), already incremented
    unless ``increment_steps`` (tensors only: the kernel adds 1 to each first, as torch's fused
    Adam does); ``decoupled=True`` is AdamW;
    ``trail_weight`` is :math:`\omega`. Same tensor requirements as :func:`trail_dot`.
    With ``with_dot`` the same pass also returns :math:`h = \sum \langle \tilde g, E\rangle` of
    the trails as they were before this update (0-dim float64, summed as :func:`trail_dot`
    sums): the lagged hypergradient (:mod:`stepsize_tower.lag`), 36 instead of 44 bytes per float32 parameter.
    """
    params = list(params)
    if not params:
        return torch.zeros((), dtype=torch.float64) if with_dot else None
    if increment_steps and not all(isinstance(s, Tensor) for s in steps):
        raise ValueError("increment_steps needs step counts as tensors (a float cannot be advanced in place)")
    counts = [s if isinstance(s, Tensor) else torch.tensor(float(s), dtype=torch.float64) for s in steps]
    h = _kernels().adam_update(
        params, list(grads), list(exp_avgs), list(exp_avg_sqs), list(trails), counts, bool(increment_steps),
        float(a), float(beta1), float(beta2), float(eps), float(weight_decay), bool(decoupled), bool(maximize),
        float(trail_weight), bool(with_dot),
    )  # fmt: skip
    return torch.tensor(h, dtype=torch.float64) if with_dot else None


def sgd_trail_update(
    params: Sequence[Tensor],
    grads: Sequence[Tensor],
    buffers: Sequence[Tensor],
    trails: Sequence[Tensor],
    kept: Sequence[Tensor],
    a: Tensor | float,
    momentum: float,
    dampening: float,
    weight_decay: float,
    nesterov: bool,
    maximize: bool,
    trail_weight: float,
    with_dot: bool = False,
) -> Tensor | None:
    r"""One ``torch.optim.SGD`` step with step size ``a`` and the trail update, in one pass, in place.

    .. math::
        \tilde g = \pm g + \lambda w, \qquad b' = \mu b + (1 - \tau)\tilde g, \qquad
        d = b' \;(\text{Nesterov: } \tilde g + \mu b';\ \mu = 0: \tilde g), \qquad
        w' = w - a d, \qquad E' = (1-\omega) E + \omega\, a d

    ``buffers`` (the momentum buffers, all present: the first step, which creates them, takes
    the default path) are used when ``momentum != 0``; ``kept`` receives :math:`\tilde g` for
    plain SGD and Nesterov (their ``prev_grad``), else is unused. Same tensor requirements as
    :func:`trail_dot`. With ``with_dot`` the same pass also returns :math:`h = \sum \langle
    \tilde g, E\rangle` of the trails as they were before this update (as :func:`adam_trail_update`).
    """
    params = list(params)
    if not params:
        return torch.zeros((), dtype=torch.float64) if with_dot else None
    h = _kernels().sgd_update(
        params, list(grads), list(buffers), list(trails), list(kept), float(a), float(momentum),
        float(dampening), float(weight_decay), bool(nesterov), bool(maximize), float(trail_weight),
        bool(with_dot),
    )  # fmt: skip
    return torch.tensor(h, dtype=torch.float64) if with_dot else None
