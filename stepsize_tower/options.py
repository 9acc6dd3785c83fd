"""Every option of the tower optimizers, once: its check, its documentation, its value in older checkpoints.

An :class:`Option` is one row of the table. The public classes read it four ways: the
constructor checks its arguments (:func:`check_defaults`), ``add_param_group`` checks each
group (:func:`check_group`), ``__setstate__`` fills options that a checkpoint saved before
the option existed lacks (:func:`fill_missing`), and the class docstrings list the
arguments (:func:`args_doc`). The default of each option is the one in the constructor's
signature (``args_doc`` reads it there); the measured ones are the constants below.

The measured defaults come from the sensitivity benchmark (``experiments/sensitivity.py``,
table in experiments/README.md). Change them only together with a fresh run of it.
"""

from __future__ import annotations

import inspect
import math
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from torch import Tensor

from . import horizon as horizon_rules
from .horizon import Horizon
from .levels import LEVEL_KINDS, MAX_LOG_CHANGE, Level

__all__ = [
    "DEFAULT_ADAM_HORIZON",
    "DEFAULT_DEPTH",
    "DEFAULT_FIRST_STEP_LIMIT",
    "DEFAULT_HORIZON",
    "DEFAULT_HYPER_LEVEL",
    "DEFAULT_SCHEDULE_HOLD_BACK",
    "GRANULARITIES",
    "LEVEL_KEYS",
    "Option",
    "args_doc",
    "check_defaults",
    "check_group",
    "default_horizon",
    "default_levels",
    "fill_missing",
    "level_spec",
    "resolve_levels",
]

# --------------------------------------------------------------------------- measured defaults

#: Levels above the base when neither ``depth`` nor ``levels`` is given.
DEFAULT_DEPTH = 1

#: Decay γ of the trail of updates the level-0 hypergradient is taken against (0 = one step
#: back, the published rule). A one-step hypergradient under minibatch noise prefers step
#: sizes that are too small (short-horizon bias); a trail of about 1 / (1 - γ) updates lets
#: oscillations cancel and measures whether the net recent movement still goes downhill.
#: Used for SGD (with or without momentum); Adam/AdamW use :data:`DEFAULT_ADAM_HORIZON`.
#: With momentum 0.9 it replaced the one-step rule (horizon 0) in session 12, measured
#: (experiments/README.md, "SGD with momentum takes the trail too"): on the noisy quadratic
#: model with heavy ball the one-step rule ended 4.6x the best fixed rate's closed-form
#: expected loss (typed 1000x too large, noise 1), the trail 0.62-0.80x in all four cases;
#: sensitivity benchmark with momentum 0.9 (8 tasks, 3 seeds, 216 points) 186 -> 192 good
#: under the gap, 141 -> 173 under the ratio, 183 -> 188 held-out.
#: A trail that grows with the run, ``(0.99, 0.999)``, was measured in session 13 and not
#: adopted: word LSTM (plain SGD, field benchmark) 1/14 -> 5/14 good, but the sensitivity
#: benchmark's plain SGD 207 -> 190 of 216 (the digits tasks need the short trail's annealing).
DEFAULT_HORIZON: Horizon = 0.99

#: The horizon of Adam-like bases: a trail of about 1 000 updates. At 0.99 the trail's
#: hypergradient asked to shrink on 99-100 % of steps past step 400 even at the best constant
#: AdamW rate of a small transformer LM (short-horizon bias), and the step size decayed all run.
#: Measured (experiments/README.md): field benchmark, byte transformer (AdamW, clipping, 1 000
#: steps) 1/14 -> 11/14 good under the 5 % normalized gap; ResNet and raw least squares unchanged;
#: 5-task sensitivity benchmark (3 seeds) Adam 128/135 good at both values. Not for SGD: there
#: 0.999 lost 9 of 135 sensitivity points (slower growth from tiny typed rates).
DEFAULT_ADAM_HORIZON = 0.999

#: Adam-like bases: the first step moves weights by at most this many times their typical
#: size (geometric mean over tensors of their root-mean-square entry; see
#: :mod:`stepsize_tower.safeguards`). Measured on the sensitivity benchmark (Adam, 5 tasks,
#: seed 0): without it 32/45 good points, with limit 1, 0.5 or 0.25 35/45 (logistic regression
#: and the GRU language model typed at lr 1 and 10 rescued, nothing lost); limit 2 and the
#: group's plain root-mean-square (dominated by the GRU's embedding table) did not rescue the
#: GRU. 0.5 rather than 1: on a small tanh network started at lr 10 or 100 a limit of 1 ended
#: 10x worse than 0.5 or none (tests/test_safeguards.py). Three seeds: see experiments/README.md.
#: 0.1 rather than 0.5 (field benchmark, 2 seeds): 0.5 starts the byte transformer at ~1e-2 and
#: the word LSTM at ~4e-2, on the edge of instability (fixed AdamW 1e-2 and Adam 3e-2 are not
#: good there). Typed 1e-2 and 1, 0.5 -> 0.1: transformer 2.13-2.56 (2 of 4 good) -> 2.05-2.16
#: (4 of 4); word LSTM 5.07-5.97 (0 of 4) -> 5.03-5.41 (2 of 4); ResNet typed 0.1 and 1 better
#: (held-out 0.026-0.031 against 0.029-0.074). The sensitivity benchmark (Adam typed 1e-4 ... 10,
#: 3 seeds) keeps every point (90 of 90 the same); 0.25 lost 3 there (the MLP on digits, one seed).
DEFAULT_FIRST_STEP_LIMIT = 0.1

#: While a scheduler holds ``lr`` below its peak, the share of each lowering move level 1 makes
#: (:mod:`stepsize_tower.schedule_anneal`). Measured (field benchmark, 2 seeds, 5 % warm-up +
#: cosine, typed 1e-4, 1e-2, 1): 0.1 ends the byte transformer below tuned AdamW + cosine from
#: every typed lr; 1 (no hold-back) does not.
DEFAULT_SCHEDULE_HOLD_BACK = 0.1

#: The level that learns momentum or betas when asked to (logit space, fixed step size).
DEFAULT_HYPER_LEVEL = Level(kind="adam", lr=0.01)

#: The keys of a level given as a dict (JSON / YAML): the fields of :class:`Level`.
LEVEL_KEYS = ("kind", "lr", "betas", "eps", "shrink", "consistency")

#: Top-level step size of a level stack, by depth (index = depth).
_TOP_LR = {1: 0.05, 2: 0.01}

GRANULARITIES = ("group", "tensor")


def default_horizon(*, adam_like: bool = False) -> Horizon:
    """The measured default horizon: :data:`DEFAULT_ADAM_HORIZON` for Adam-like bases, else
    :data:`DEFAULT_HORIZON` (SGD, with or without momentum)."""
    return DEFAULT_ADAM_HORIZON if adam_like else DEFAULT_HORIZON


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


# --------------------------------------------------------------------------- levels


def resolve_levels(depth: int | None, levels: Sequence[Level | str | dict[str, Any]] | None) -> tuple[Level, ...]:
    """Turn the ``depth`` / ``levels`` constructor arguments into a tuple of levels.

    ``levels`` wins when given (a string is a level kind with that kind's default
    settings; a dict holds :class:`Level` fields, as read from JSON or YAML); ``depth``
    alone gives the measured default levels (:func:`default_levels`); neither gives
    :data:`DEFAULT_DEPTH`. Giving both requires ``len(levels) == depth``.
    """
    if depth is not None and (isinstance(depth, bool) or not isinstance(depth, int) or depth < 0):
        raise ValueError(f"Invalid depth: {depth!r}; expected an integer >= 0 (0 = a plain fixed-rate optimizer)")
    if levels is None:
        return default_levels(DEFAULT_DEPTH if depth is None else depth)
    if isinstance(levels, (str, Level)):
        raise ValueError(f"Invalid levels: {levels!r}; expected a list of Level objects or kind names")
    resolved = tuple(_as_level(i, lv) for i, lv in enumerate(levels))
    if depth is not None and depth != len(resolved):
        raise ValueError(f"depth={depth} disagrees with len(levels)={len(resolved)}; pass one of them")
    return resolved


def _as_level(i: int, lv: Level | str | dict[str, Any]) -> Level:
    if isinstance(lv, Level):
        return lv
    if isinstance(lv, str) and lv in LEVEL_KINDS:
        return Level(kind=lv)
    if isinstance(lv, dict):
        unknown = sorted(set(lv) - set(LEVEL_KEYS))
        if unknown:
            raise ValueError(f"Invalid levels[{i}]: unknown key(s) {unknown}; expected {', '.join(LEVEL_KEYS)}")
        fields: dict[str, Any] = {k: tuple(v) if k == "betas" else v for k, v in lv.items()}
        return Level(**fields)
    raise ValueError(f"Invalid levels[{i}]: {lv!r}; expected a Level or one of {', '.join(map(repr, LEVEL_KINDS))}")


def level_spec(level: Level | dict[str, Any]) -> dict[str, Any]:
    """A level as a plain dict (not a dataclass), so checkpoints load with ``torch.load(weights_only=True)``."""
    lv = level if isinstance(level, Level) else Level(**level)
    return {
        "kind": lv.kind,
        "lr": lv.lr,
        "betas": tuple(lv.betas),
        "eps": lv.eps,
        "shrink": lv.shrink,
        "consistency": lv.consistency,
    }


# --------------------------------------------------------------------------- checks

_ABSENT = object()


def _is_number(x: Any) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool)


def _check_lr(lr: Any) -> str | None:
    if isinstance(lr, Tensor) and lr.numel() != 1:
        return f"Invalid learning rate: a tensor of {lr.numel()} elements; expected a single number (one element)"
    value = lr.item() if isinstance(lr, Tensor) else lr
    if not (isinstance(value, (int, float)) and math.isfinite(value) and value >= 0):
        return f"Invalid learning rate: {lr!r}; expected a finite number >= 0"
    return None


def _check_granularity(granularity: Any) -> str | None:
    if granularity not in GRANULARITIES:
        return f"Invalid granularity: {granularity!r}; expected one of {GRANULARITIES}"
    return None


def _check_bool(name: str) -> Callable[[Any], str | None]:
    def check(value: Any) -> str | None:
        return None if isinstance(value, bool) else f"Invalid {name}: {value!r}; expected True or False"

    return check


def _check_native(value: Any) -> str | None:
    if value is None or isinstance(value, bool) or value == "lagged":  # "lagged": an older spelling of True
        return None
    return f"Invalid native: {value!r}; expected None (the default), True or False"


def _check_native_flag(value: Any) -> str | None:
    if value is None or isinstance(value, bool):
        return None
    return f"Invalid native: {value!r}; expected None (the default), True or False"


def _check_sharded_flag(value: Any) -> str | None:
    if value is None or isinstance(value, bool):
        return None
    return f"Invalid sharded: {value!r}; expected True, False or None (detect)"


def _check_first_step_limit(limit: Any) -> str | None:
    if limit is None or (_is_number(limit) and math.isfinite(limit) and limit > 0):
        return None
    return (
        f"Invalid first_step_limit: {limit!r}; expected a number > 0 (the first step moves weights by at most "
        "that many times their typical size) or None to turn the limit off"
    )


def _check_schedule_hold_back(share: Any) -> str | None:
    if _is_number(share) and math.isfinite(share) and 0 < share <= 1:
        return None
    return (
        f"Invalid schedule_hold_back: {share!r}; expected a number in (0, 1]: the share of each lowering "
        "move level 1 makes while a scheduler anneals lr (1 turns the hold-back off)"
    )


def _check_growth_search(max_move: Any) -> str | None:
    if max_move is None or (_is_number(max_move) and math.isfinite(max_move) and 0 < max_move <= MAX_LOG_CHANGE):
        return None
    return (
        f"Invalid growth_search: {max_move!r}; expected a number in (0, {MAX_LOG_CHANGE:g}] (the start-up "
        "search grows log(lr) by at most that much per step) or None to turn the search off"
    )


def _check_fused(fused: Any) -> str | None:
    if fused is None or isinstance(fused, bool):
        return None
    return f"Invalid fused: {fused!r}; expected True, False or None"


def _check_momentum(momentum: Any) -> str | None:
    if not 0.0 <= momentum < 1.0:
        return f"Invalid momentum value: {momentum}; expected 0 <= momentum < 1"
    return None


def _check_dampening(dampening: Any) -> str | None:
    if not 0.0 <= dampening <= 1.0:
        return f"Invalid dampening value: {dampening}; expected 0 <= dampening <= 1"
    return None


def _check_weight_decay(weight_decay: Any) -> str | None:
    if not 0.0 <= weight_decay:
        return f"Invalid weight_decay value: {weight_decay}; expected weight_decay >= 0"
    return None


def _check_eps(eps: Any) -> str | None:
    if not 0.0 <= eps:
        return f"Invalid epsilon value: {eps}; expected eps >= 0"
    return None


def _check_betas(betas: Any) -> str | None:
    if len(betas) == 2 and isinstance(betas[0], Tensor) != isinstance(betas[1], Tensor):
        return f"Invalid betas: {betas}; expected both floats or both tensors"
    if len(betas) != 2 or not all(0.0 <= b < 1.0 for b in betas):
        return f"Invalid betas: {betas}; expected two numbers in [0, 1)"
    return None


# --------------------------------------------------------------------------- the table


@dataclass(frozen=True)
class Option:
    """One option: its check (an error message, or None when valid), its doc line(s), its legacy value.

    ``legacy`` is the value a group saved before the option existed gets when loaded, or a
    function of the loaded group giving it (e.g. the measured default for that group);
    ``_ABSENT`` for options every checkpoint has.
    ``default_doc`` replaces the signature's default in the documentation when that is not
    the value itself (e.g. ``None`` meaning "measured").
    """

    name: str
    doc: str
    check: Callable[[Any], str | None] | None = None
    legacy: Any = _ABSENT
    default_doc: str | None = None


TOWER_OPTIONS: tuple[Option, ...] = (
    Option(
        "depth",
        "number of levels above the base; 0 is a plain fixed-rate optimizer",
        default_doc="the measured :data:`stepsize_tower.options.DEFAULT_DEPTH`",
    ),
    Option(
        "levels",
        "the levels themselves, level 1 first: :class:`Level` objects or kind names "
        '(``"adam"``, ``"sgd"``); the last level\'s ``lr`` is fixed',
        default_doc="measured defaults, :func:`stepsize_tower.options.default_levels`",
    ),
    Option(
        "granularity",
        '``"group"`` learns one step size per parameter group, ``"tensor"`` one per parameter tensor',
        _check_granularity,
        legacy="group",
    ),
    Option(
        "retreat",
        "during the first steps, when the next gradient shows the loss rose along the last step, take it "
        "back and redo it with the secant step size; for SGD, also at any step when the gradient blows up "
        "past 10x its peak, and the first step moves the weights at most 10x their typical size (so that "
        "float32 can undo it)",
        _check_bool("retreat"),
        legacy=True,
    ),
    Option(
        "horizon",
        "decay γ of the trail of recent updates that the step size's hypergradient is taken against; 0 is "
        "the one-step-back hypergradient. A pair ``(γ_0, γ_1)`` lets the trail grow with the run: it spans "
        "as many updates as steps taken, from ``1/(1-γ_0)`` up to ``1/(1-γ_1)`` (:mod:`stepsize_tower.horizon`)",
        horizon_rules.check,
        legacy=lambda group: default_horizon(adam_like="betas" in group),
        default_doc="measured, :func:`stepsize_tower.options.default_horizon`: 0.999 for Adam/AdamW, "
        "0.99 for SGD (with or without momentum)",
    ),
    Option(
        "lagged",
        "after the start-up window, the step size of step s+1 learns from the trail hypergradient of step "
        "s, ``<g_s, E_{s-1}>``, taken inside step s's update pass, instead of from ``<g_{s+1}, E_s>`` in a "
        "read pass of its own: one pass over the gradients and the trail less per step, and the step size "
        "reacts a step later. Kept in the state, so a resumed run continues bit for bit "
        "(:mod:`stepsize_tower.lag`). ``False``: the exact hypergradient",
        _check_bool("lagged"),
        legacy=False,
        default_doc="True for TowerAdam and TowerAdamW, measured within noise of the exact hypergradient on the "
        "sensitivity and field benchmarks; False for TowerSGD, where the sensitivity benchmark measured a small "
        "cost (experiments/README.md, session 14); False in a checkpoint saved before this option existed",
    ),
    Option(
        "growth_search",
        "opt-in start-up search for a step size typed far too small, for full-batch or large-batch runs: "
        "while every step so far kept at least half the loss's slope along it, level 1's growth of "
        "``log a_0`` is sped up by ``stepsize_tower.search.SEARCH_SPEEDUP ** n`` at the search's step ``n``, "
        "by at most this much per step (0.5 is a factor 1.65); the first step that fails the test, or a "
        "retreat, ends it for good. Under minibatch noise the test fails within a few steps, so it rarely "
        "helps there (measured; see experiments/README.md)",
        _check_growth_search,
        legacy=None,
        default_doc="None, off",
    ),
    Option(
        "schedule_hold_back",
        "while a scheduler holds ``lr`` below its largest value so far (it is annealing), level 1 makes "
        "only this share of each move that lowers the learned factor, so the schedule owns the decay; "
        "raising moves, warm-ups and runs at a constant ``lr`` are unchanged; 1 turns it off "
        "(:mod:`stepsize_tower.schedule_anneal`)",
        _check_schedule_hold_back,
        legacy=DEFAULT_SCHEDULE_HOLD_BACK,
        default_doc="the measured :data:`stepsize_tower.options.DEFAULT_SCHEDULE_HOLD_BACK` (0.1)",
    ),
    Option("maximize", "maximize the objective instead of minimizing it", _check_bool("maximize"), legacy=False),
    Option(
        "sharded",
        "the group's parameters are split over the ranks of the default process group "
        "(``torch.distributed.optim.ZeroRedundancyOptimizer``, FSDP2 ``fully_shard``): every dot product "
        "(and the largest gradient entry, and the finiteness test) is all-reduced across ranks before the "
        'step size moves, so all ranks learn the same step size. Needs ``granularity="group"``. Does '
        "nothing (no collective call) when ``torch.distributed`` is not initialized. Not needed under "
        "``DistributedDataParallel``, whose gradients are already all-reduced. ``None`` detects: FSDP2 "
        "parameters (DTensors) reduce without being asked, and under ``torch.distributed`` the first step "
        "compares what each rank holds and warns once when ranks differ (e.g. ZeRO without ``sharded=True``)",
        _check_sharded_flag,
        legacy=None,
    ),
)

SGD_OPTIONS: tuple[Option, ...] = (
    Option(
        "lr", "initial step size, and the outer factor any scheduler rescales (torch.optim.SGD's default)", _check_lr
    ),
    Option("momentum", "momentum factor μ", _check_momentum),
    Option("dampening", "dampening τ for momentum", _check_dampening),
    Option("nesterov", "use Nesterov momentum", _check_bool("nesterov")),
    Option("weight_decay", "L2 penalty λ, part of the loss", _check_weight_decay),
    Option(
        "learn_momentum",
        "learn μ online as well, in logit space, with the closed-form hypergradient ``-a_0 <g_s, ∂d_{0,s-1}/∂μ>``",
        _check_bool("learn_momentum"),
        legacy=False,
    ),
    Option("hyper_level", "the :class:`Level` that learns μ", default_doc="Adam-like, lr 0.01"),
    Option(
        "fused",
        "use torch's fused SGD kernel for the update; None picks it when the parameters allow (one "
        "CPU/CUDA float dtype and device, dense and laid out like their gradients; not with "
        "``learn_momentum``) and levels are on top (at ``depth=0`` None is torch.optim.SGD's default path)",
        _check_fused,
        legacy=None,
    ),
    Option(
        "native",
        "on CPU, with momentum (not Nesterov), take the hypergradient ``<g_s, buf>`` and the blow-up "
        "guard's largest gradient entry in one C++ read pass, built with PyTorch's extension machinery "
        "on the first such step (about half a minute, once) and cached. ``None`` (the default): wherever "
        "it applies; ``False``: never (the reference path, as on CUDA). Same results up to rounding of "
        "the dot product; ``STEPSIZE_TOWER_NATIVE=0`` turns it off",
        _check_native_flag,
        legacy=False,
    ),
)

ADAM_OPTIONS: tuple[Option, ...] = (
    Option("lr", "initial step size, and the outer factor any scheduler rescales", _check_lr),
    Option("betas", "coefficients of the running averages", _check_betas),
    Option("eps", "added to the denominator", _check_eps),
    Option(
        "weight_decay",
        "L2 penalty λ (TowerAdamW: decoupled decay)",
        _check_weight_decay,
        default_doc="0; TowerAdamW: 1e-2",
    ),
    Option(
        "fused",
        "use torch's fused kernel for the update; None picks it when the parameters allow and levels are "
        "on top (at ``depth=0`` None is torch.optim.Adam's default path)",
        _check_fused,
        legacy=None,
    ),
    Option(
        "learn_betas",
        "learn β1 and β2 online as well, in logit space, with closed-form hypergradients (see "
        ":class:`~stepsize_tower.bases.adam.AdamRule`); uses the unfused update",
        _check_bool("learn_betas"),
        legacy=False,
    ),
    Option("hyper_level", "the :class:`Level` that learns the betas", default_doc="Adam-like, lr 0.01"),
    Option(
        "compiled",
        "run the step as two kernels compiled with ``torch.compile`` (a read pass for the hypergradient, "
        "then one loop that updates weights, moments and the trail together) instead of torch's fused "
        "kernel plus three passes. Same results up to float32 rounding. The first step compiles "
        '(seconds); needs float32 parameters, ``granularity="group"``, ``horizon > 0`` and a working '
        "inductor backend (a C++ compiler on CPU), and silently uses the default path otherwise",
        _check_bool("compiled"),
        legacy=False,
    ),
    Option(
        "native",
        "on CPU, run the step in C++ kernels built with PyTorch's extension machinery on the first "
        "step (about half a minute, once) and cached: a read pass for the hypergradient, then one "
        "multi-threaded loop that updates weights, moments and the trail together. ``None`` (the "
        "default): wherever they apply, unless ``compiled=True``; ``True``: also over ``compiled``; "
        "``False``: never (the reference path, as on CUDA). Same results up to rounding; needs "
        'float32/float64 parameters, ``granularity="group"``, ``horizon > 0``, a C++ compiler and '
        "ninja, and uses the reference path otherwise (one logged notice). ``STEPSIZE_TOWER_NATIVE=0`` "
        'turns it off. ``"lagged"``, from before the lag became the method (option ``lagged``), means True',
        _check_native,
        legacy=False,
    ),
    Option(
        "first_step_limit",
        "with levels, the first step size is cut to ``min(a_0, first_step_limit * s)``, ``s`` the "
        "geometric mean over the group's nonzero tensors of their root-mean-square entry: an Adam step "
        "moves every weight by about ``a_0``, and a first step larger than the weights themselves wrecks "
        "the model where the start-up test cannot see it. ``None`` turns it off",
        _check_first_step_limit,
        legacy=None,
        default_doc="0.5, measured; see :mod:`stepsize_tower.safeguards`",
    ),
)


def _relations(group: Mapping[str, Any]) -> str | None:
    """Checks that involve two options of one group."""
    if group.get("nesterov") and (group["momentum"] <= 0 or group["dampening"] != 0):
        return "Nesterov momentum requires momentum > 0 and dampening = 0"
    if group.get("learn_momentum") and not 0.0 < group["momentum"] < 1.0:
        return f"learn_momentum=True needs an initial momentum in (0, 1); got momentum={group['momentum']}"
    if group.get("learn_betas") and not all(0.0 < b < 1.0 for b in group["betas"]):
        return f"learn_betas=True needs initial betas in (0, 1); got betas={group['betas']}"
    if group.get("sharded") and group.get("granularity") != "group":
        return (
            f"sharded=True needs granularity='group' (got {group.get('granularity')!r}): "
            "ranks hold different tensors, so per-tensor step sizes cannot be matched up"
        )
    return None


def _raise_first(messages: Iterable[str | None]) -> None:
    for message in messages:
        if message is not None:
            raise ValueError(message)


def check_defaults(options: Sequence[Option], defaults: Mapping[str, Any]) -> None:
    """Raise ``ValueError`` naming the first invalid constructor argument and the accepted values."""
    _raise_first(o.check(defaults[o.name]) for o in options if o.check is not None and o.name in defaults)
    _raise_first([_relations(defaults)])


def check_group(options: Sequence[Option], group: Mapping[str, Any], defaults: Mapping[str, Any]) -> None:
    """Raise ``ValueError`` for an invalid option of ``group``, or one that clashes with the defaults it takes."""
    _raise_first(o.check(group[o.name]) for o in options if o.check is not None and o.name in group)
    _raise_first([_relations({**defaults, **group})])


def fill_missing(options: Sequence[Option], group: dict[str, Any]) -> None:
    """Give a group loaded from an older checkpoint the options it lacks, at their legacy values."""
    for option in options:
        if option.legacy is not _ABSENT and option.name not in group:
            group[option.name] = option.legacy(group) if callable(option.legacy) else option.legacy


def args_doc(options: Sequence[Option], init: Callable[..., Any]) -> str:
    """The ``Args:`` entries of ``options``, with each default read from ``init``'s signature."""
    signature = inspect.signature(init).parameters
    lines = []
    for option in options:
        default = option.default_doc
        if default is None:
            default = repr(signature[option.name].default)
        lines.append(_wrap(f"{option.name}: {option.doc} (default: {default})."))
    return "\n".join(lines)


def _wrap(text: str, width: int = 96) -> str:
    """One docstring argument entry, indented as in the class docstrings."""
    words, lines, line = text.split(), [], "        "
    for word in words:
        if len(line) + len(word) + 1 > width and line.strip():
            lines.append(line.rstrip())
            line = "            "
        line += word + " "
    lines.append(line.rstrip())
    return "\n".join(lines)
