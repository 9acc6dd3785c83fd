"""Compiled fused passes for the Adam step with the trail: correctness, compile cost and step time.

What it measures
    * Correctness of the library's kernels (``stepsize_tower/bases/compiled.py``, whose
      building blocks the variants here reuse) and of the lagged one defined here (compiled
      with torch.compile / inductor when it works, else eagerly):
      - against a float64 reference written with plain torch ops (one step from the same
        float32 state): max abs and max relative differences of w, m, v, the trail E and the
        dot product h = <g, E>, for Adam, Adam with L2 decay and ``maximize``, and AdamW;
      - the w, m, v part against ``torch.optim.Adam`` / ``torch.optim.AdamW`` (single-tensor
        and fused) over several steps with a fixed step size.
    * Recompiles: the kernels are called with changing step sizes ``a`` (0-dim float64 tensor)
      and step counts under ``torch._dynamo.config.error_on_recompile``; the dynamo graph
      counter must not move.
    * Fusion: the generated C++ of a small case, counting the loops over each tensor (one loop
      per tensor means one pass over memory).
    * Fallback: the eager path (``available()`` False) gives the same results.
    * Compile time: first call of each kernel at each size (compile + one run).
    * Step time, ``torch.set_num_threads(1)`` by default, at 1M and 10M float32 parameters
      split like a model (square Linear weights + biases, as in ``step_cost.py``): medians and
      minimums of round-robin rounds (each contender one step per round, start rotated) of
        - torch ``Adam(fused=True)`` (the reference of every ratio) and ``Adam(foreach=True)``;
        - ``TowerAdam(lr=1e-3)`` default (its first 12 steps are skipped: start-up is slower);
        - ``two-pass``: ``two_pass_dot`` + ``adam_trail_update`` (the default order);
        - ``lagged 1-pass``: ``lagged_adam_trail`` with a second trail buffer (swapped each step);
        - ``lagged in-place``: ``lagged_adam_trail`` updating the trail in place.
      The compiled contenders skip the scalar math on h (a few 0-dim ops) and step with a fixed
      ``a``; they do increment the step counts, like torch's fused Adam.

How to run
    .venv/bin/python experiments/fused_pass.py                  # 1M and 10M, 30 rounds; a few minutes
    .venv/bin/python experiments/fused_pass.py --quick          # smoke test (small sizes, few rounds)
    .venv/bin/python experiments/fused_pass.py --sizes 1e6 1e7 --rounds 40 --threads 1 --cold

    ``--cold`` turns off inductor's on-disk caches so the compile times are those of a first
    run; without it a second run of the script reads compiled kernels from the cache.
    ``STEPSIZE_TOWER_COMPILE=0`` runs everything eagerly (the fallback).
    Output: ``--out`` (default ``experiments/out/fused_pass``): ``results.md`` (also printed)
    and ``results.json``.

How to read it
    Ratios are to torch fused Adam, of medians and of minimums. On a shared machine the
    minimum is the steadier number (noise only adds time); the median shows what a loaded
    machine gives. Memory traffic sets the floor: fused Adam moves 28 bytes per parameter
    (reads w, g, m, v; writes w, m, v), the one-pass trail step 36 (+E read and write), the
    two-pass step 44 (+ g and E read again), so 1.29x and 1.57x are the bandwidth-bound
    limits of the lagged and the two-pass paths. Writing the trail to a second buffer adds a
    read of each destination cache line (write-allocate), 40 bytes; the in-place lagged kernel
    runs its two loops per tensor, so its second loop reads g and E from cache when a tensor's
    arrays fit in the last-level cache.
"""

from __future__ import annotations

import argparse
import gc
import json
import math
import os
import re
import statistics
import subprocess
import sys
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import torch
from torch import Tensor, nn

from stepsize_tower import TowerAdam

sys.path.insert(0, str(Path(__file__).resolve().parent))
from step_cost import environment  # a sibling script, not a package

from stepsize_tower.bases import compiled as C  # the library's kernels and their building blocks

BETA1, BETA2, EPS = 0.9, 0.999, 1e-8
TRAIL_WEIGHT = 0.01  # 1 - horizon
LR = 1e-3
TOWER_SKIP = 12
CASES = {  # name: (weight_decay, decoupled, maximize)
    "Adam": (0.0, False, False),
    "Adam L2 + maximize": (0.1, False, True),
    "AdamW": (0.01, True, False),
}


# --------------------------------------------------------------------------- tensors


def layer_shapes(n_params: int) -> tuple[int, int]:
    """``(width, layers)`` of a stack of square Linear layers (weight + bias) with about ``n_params``."""
    width = 2 ** max(3, round(math.log2(math.sqrt(n_params / 8))))
    layers = max(1, round(n_params / (width * width + width)))
    return width, layers


def model_shapes(n_params: int) -> list[tuple[int, ...]]:
    width, layers = layer_shapes(n_params)
    return [s for _ in range(layers) for s in ((width, width), (width,))]


class State:
    """Float32 parameters, gradients, Adam moments, two trail buffers and step counts."""

    def __init__(self, shapes: list[tuple[int, ...]], seed: int, steps: float = 3.0) -> None:
        gen = torch.Generator().manual_seed(seed)

        def rnd(s: tuple[int, ...], scale: float) -> Tensor:
            return torch.randn(s, generator=gen) * scale

        self.w = [rnd(s, 1.0 / math.sqrt(s[-1])) for s in shapes]
        self.g = [rnd(s, 1e-2) for s in shapes]
        self.m = [rnd(s, 1e-3) for s in shapes]
        self.v = [rnd(s, 1e-3) ** 2 for s in shapes]
        self.e = [rnd(s, 1e-4) for s in shapes]
        self.e2 = [torch.zeros(s) for s in shapes]
        self.steps = [torch.tensor(steps) for _ in shapes]

    def clone(self) -> State:
        out = State.__new__(State)
        for k in ("w", "g", "m", "v", "e", "e2", "steps"):
            setattr(out, k, [t.clone() for t in getattr(self, k)])
        return out


# --------------------------------------------------------------------------- float64 reference


def reference(st: State, a: float, wd: float, decoupled: bool, maximize: bool) -> dict[str, Any]:
    """One step in float64 with plain torch ops, from the float32 state (steps already incremented)."""
    out: dict[str, Any] = {"w": [], "m": [], "v": [], "e": [], "dot": 0.0}
    dot = torch.zeros((), dtype=torch.float64)
    for w, g, m, v, e, step in zip(st.w, st.g, st.m, st.v, st.e, st.steps, strict=True):
        w, g, m, v, e = (x.double() for x in (w, g, m, v, e))
        t = float(step)
        gt = -g if maximize else g
        if wd and not decoupled:
            gt = gt + wd * w
        dot += (gt * e).sum()
        m_new = BETA1 * m + (1 - BETA1) * gt
        v_new = BETA2 * v + (1 - BETA2) * gt * gt
        u = (m_new / (1 - BETA1**t)) / (torch.sqrt(v_new / (1 - BETA2**t)) + EPS)
        delta = a * u + (a * wd * w if decoupled and wd else 0.0)
        out["w"].append(w - delta)
        out["m"].append(m_new)
        out["v"].append(v_new)
        out["e"].append((1 - TRAIL_WEIGHT) * e + TRAIL_WEIGHT * delta)
    out["dot"] = float(dot)
    return out


def diffs(got: list[Tensor], want: list[Tensor]) -> tuple[float, float]:
    """``(max |got - want|, max |got - want| / max |want|)`` over all tensors (normwise relative)."""
    abs_d = max(float((x.double() - y.double()).abs().max()) for x, y in zip(got, want, strict=True))
    scale = max(float(y.double().abs().max()) for y in want)
    return abs_d, abs_d / scale if scale else abs_d


def elem_rel(got: list[Tensor], want: list[Tensor]) -> float:
    """Largest elementwise relative difference (entries with |want| above 1e-6 of the largest)."""
    scale = max(float(y.double().abs().max()) for y in want)
    out = 0.0
    for x, y in zip(got, want, strict=True):
        y = y.double()
        keep = y.abs() > 1e-6 * scale
        if keep.any():
            out = max(out, float(((x.double() - y).abs()[keep] / y.abs()[keep]).max()))
    return out


# --------------------------------------------------------------------------- the lagged kernel (measured here only)


def _lagged_body(
    params: list[Tensor],
    grads: list[Tensor],
    exp_avgs: list[Tensor],
    exp_avg_sqs: list[Tensor],
    emas: list[Tensor],
    emas_out: list[Tensor],
    steps: list[Tensor],
    a: Tensor,
    beta1: float,
    beta2: float,
    eps: float,
    weight_decay: float,
    decoupled: bool,
    maximize: bool,
    trail_weight: float,
) -> tuple[Tensor, Tensor]:
    coefs = C._adam_scalars(steps, a, beta1, beta2, weight_decay, decoupled)
    # The dot product is written after the update on purpose: inductor (CPU) fuses a reduction
    # into the loop of the pointwise nodes before it, not into the ones after it.
    dots = []
    for i, (p, g, m, v, e, e_out) in enumerate(zip(params, grads, exp_avgs, exp_avg_sqs, emas, emas_out, strict=True)):
        gt, w_new, m_new, v_new, e_new = C.adam_trail_values(
            p, g, m, v, e, coefs[i], beta1, beta2, eps, weight_decay, decoupled, maximize, trail_weight
        )
        dots.append(C._dot64(gt, e))
        p.copy_(w_new)
        m.copy_(m_new)
        v.copy_(v_new)
        e_out.copy_(e_new)
    total = torch.zeros((), dtype=torch.float64, device=grads[0].device)
    for d in dots:
        total = total + d
    return total, coefs


def _lagged_inplace_body(
    params: list[Tensor],
    grads: list[Tensor],
    exp_avgs: list[Tensor],
    exp_avg_sqs: list[Tensor],
    emas: list[Tensor],
    steps: list[Tensor],
    a: Tensor,
    beta1: float,
    beta2: float,
    eps: float,
    weight_decay: float,
    decoupled: bool,
    maximize: bool,
    trail_weight: float,
) -> tuple[Tensor, Tensor]:
    total = C._dot_body(params, grads, emas, weight_decay, decoupled, maximize)
    coefs = C._update_body(
        params, grads, exp_avgs, exp_avg_sqs, emas, steps, a, beta1, beta2, eps, weight_decay, decoupled, maximize,
        trail_weight,
    )  # fmt: skip
    return total, coefs


def lagged_adam_trail(
    params: list[Tensor],
    grads: list[Tensor],
    exp_avgs: list[Tensor],
    exp_avg_sqs: list[Tensor],
    emas: list[Tensor],
    steps: list[Tensor],
    a: Tensor,
    beta1: float,
    beta2: float,
    eps: float,
    weight_decay: float,
    decoupled: bool,
    maximize: bool,
    trail_weight: float,
    emas_out: list[Tensor] | None = None,
) -> Tensor:
    r"""The step of ``adam_trail_update`` and, from the same pass, ``Σ_i <g̃_i, E_i>`` (float64).

    The dot product is against the trail *read* by this step, so a caller that learns the
    step size from it uses it one step late. With ``emas_out`` (a second list of trail
    buffers, swapped by the caller after each step) the whole step is ONE loop per tensor;
    without it the trail is updated in place and inductor emits two loops (the dot product,
    then the update). L2 decay also gives two loops: the dot product reads ``w`` first.
    """
    C._check(params, grads, exp_avgs, exp_avg_sqs, emas, steps)
    hyper = (float(beta1), float(beta2), float(eps), float(weight_decay), bool(decoupled), bool(maximize))
    common = (steps, C._as_step_size(a, params[0]), *hyper, float(trail_weight))
    head = (params, grads, exp_avgs, exp_avg_sqs, emas)
    if emas_out is None:
        return C._run("lagged_inplace", _lagged_inplace_body, *head, *common)[0]  # type: ignore[no-any-return]
    C._check(params, emas_out)
    if any(o.data_ptr() == e.data_ptr() for o, e in zip(emas_out, emas, strict=True)):
        raise ValueError("emas_out must not alias emas; pass emas_out=None to update the trail in place")
    return C._run("lagged", _lagged_body, *head, emas_out, *common)[0]  # type: ignore[no-any-return]


def run_kernel(kind: str, st: State, a: Tensor, wd: float, dec: bool, mx: bool) -> tuple[float, list[Tensor]]:
    """One step of ``kind`` on ``st`` (steps incremented first); returns (dot, new trail)."""
    torch._foreach_add_(st.steps, 1)
    args = (BETA1, BETA2, EPS, wd, dec, mx, TRAIL_WEIGHT)
    if kind == "two-pass":
        h = C.two_pass_dot(st.g, st.e, params=st.w, weight_decay=wd, decoupled=dec, maximize=mx)
        C.adam_trail_update(st.w, st.g, st.m, st.v, st.e, st.steps, a, *args)
        return float(h), st.e
    if kind == "lagged 1-pass":
        h = lagged_adam_trail(st.w, st.g, st.m, st.v, st.e, st.steps, a, *args, emas_out=st.e2)
        return float(h), st.e2
    if kind == "lagged in-place":
        h = lagged_adam_trail(st.w, st.g, st.m, st.v, st.e, st.steps, a, *args)
        return float(h), st.e
    raise ValueError(kind)


KINDS = ("two-pass", "lagged 1-pass", "lagged in-place")


def check_reference(shapes: list[tuple[int, ...]], seed: int) -> list[dict[str, Any]]:
    rows = []
    a_val = 3e-3
    a = torch.tensor(a_val, dtype=torch.float64)
    for case, (wd, dec, mx) in CASES.items():
        for kind in KINDS:
            st = State(shapes, seed)
            ref_st = st.clone()
            torch._foreach_add_(ref_st.steps, 1)
            ref = reference(ref_st, a_val, wd, dec, mx)
            h, e_new = run_kernel(kind, st, a, wd, dec, mx)
            row: dict[str, Any] = {"case": case, "kernel": kind}
            for key, got in (("w", st.w), ("m", st.m), ("v", st.v), ("E", e_new)):
                want = ref[key.lower()]
                row[f"{key} abs"], row[f"{key} rel"] = diffs(got, want)
                row[f"{key} elem rel"] = elem_rel(got, want)
            row["h abs"] = abs(h - ref["dot"])
            row["h rel"] = abs(h - ref["dot"]) / abs(ref["dot"]) if ref["dot"] else 0.0
            # the float32 baseline for h: torch.dot in float32, as the engine computes it today
            g32 = [
                (-g if mx else g) + (wd * w if wd and not dec else 0) for g, w in zip(ref_st.g, ref_st.w, strict=True)
            ]
            h32 = sum(float(torch.dot(g.reshape(-1), e.reshape(-1))) for g, e in zip(g32, ref_st.e, strict=True))
            row["h rel (float32 torch.dot)"] = abs(h32 - ref["dot"]) / abs(ref["dot"]) if ref["dot"] else 0.0
            rows.append(row)
    return rows


def check_torch_optim(shapes: list[tuple[int, ...]], seed: int, n_steps: int = 5) -> list[dict[str, Any]]:
    """w, m, v after ``n_steps`` with a fixed step size, against torch.optim Adam / AdamW."""
    rows = []
    a_val = 1e-3
    a = torch.tensor(a_val, dtype=torch.float64)
    for case, (wd, dec, mx) in CASES.items():
        for impl in ("single-tensor", "fused"):
            for kind in KINDS:
                st = State(shapes, seed, steps=0.0)
                for t in st.m + st.v + st.e:
                    t.zero_()
                params = [nn.Parameter(w.clone()) for w in st.w]
                for p, g in zip(params, st.g, strict=True):
                    p.grad = g.clone()
                cls = torch.optim.AdamW if dec else torch.optim.Adam
                extra = {"fused": True} if impl == "fused" else {"foreach": False}
                opt = cls(params, lr=a_val, betas=(BETA1, BETA2), eps=EPS, weight_decay=wd, maximize=mx, **extra)
                for _ in range(n_steps):
                    opt.step()
                    run_kernel(kind, st, a, wd, dec, mx)
                    if kind == "lagged 1-pass":
                        st.e, st.e2 = st.e2, st.e
                row: dict[str, Any] = {"case": case, "torch": impl, "kernel": kind, "steps": n_steps}
                for key, got, want in (
                    ("w", st.w, [p.detach() for p in params]),
                    ("m", st.m, [opt.state[p]["exp_avg"] for p in params]),
                    ("v", st.v, [opt.state[p]["exp_avg_sq"] for p in params]),
                ):
                    row[f"{key} abs"], row[f"{key} rel"] = diffs(got, want)
                rows.append(row)
    return rows


# --------------------------------------------------------------------------- recompiles, fusion, fallback


def graph_count() -> int:
    from torch._dynamo.utils import counters

    return int(counters["stats"]["unique_graphs"])


def check_recompiles(shapes: list[tuple[int, ...]], seed: int) -> dict[str, Any]:
    if not C.available():
        return {"compiled": False}
    out: dict[str, Any] = {"compiled": True}
    for kind in KINDS:
        st = State(shapes, seed)
        run_kernel(kind, st, torch.tensor(1e-3, dtype=torch.float64), 0.0, False, False)  # compile (if new)
        before = graph_count()
        err = None
        try:
            with torch._dynamo.config.patch(error_on_recompile=True):
                for a_val in (2e-3, 5e-4, 1.0, 1e-7, 3.3e-2):
                    run_kernel(kind, st, torch.tensor(a_val, dtype=torch.float64), 0.0, False, False)
                    if kind == "lagged 1-pass":
                        st.e, st.e2 = st.e2, st.e
        except Exception as exc:  # error_on_recompile raises on the first recompile
            err = f"{type(exc).__name__}: {str(exc)[:200]}"
        out[kind] = {"new graphs": graph_count() - before, "error": err}
    return out


LOOP = re.compile(r"for\(int64_t x0=static_cast<int64_t>\(0L\); x0<static_cast<int64_t>\((\d+)L\)")


def check_fusion(seed: int) -> dict[str, Any]:
    """Loops over the full length of each tensor in the generated C++ (small case, no cache)."""
    if not C.available():
        return {"compiled": False}
    from torch._inductor.utils import run_and_get_code

    shapes: list[tuple[int, ...]] = [(48, 64), (40,)]
    sizes = {str(math.prod(s)) for s in shapes}
    out: dict[str, Any] = {"compiled": True, "shapes": shapes}
    with torch._inductor.config.patch(force_disable_caches=True):
        for case, (wd, dec, mx) in CASES.items():
            for kind in KINDS:
                C._compiled.clear()
                torch._dynamo.reset()
                st = State(shapes, seed)
                a = torch.tensor(1e-3, dtype=torch.float64)
                _, codes = run_and_get_code(run_kernel, kind, st, a, wd, dec, mx)
                src = "\n".join(codes)
                loops = [n for n in LOOP.findall(src) if n in sizes]
                out[f"{case} / {kind}"] = {
                    "kernels": src.count('extern "C"'),
                    "full-length loops": len(loops),
                    "tensors": len(shapes),
                }
    C._compiled.clear()
    torch._dynamo.reset()
    return out


def check_fallback(shapes: list[tuple[int, ...]], seed: int) -> dict[str, Any]:
    """Eager (STEPSIZE_TOWER_COMPILE=0) against compiled; and a simulated compiler failure."""
    out: dict[str, Any] = {}
    a = torch.tensor(2e-3, dtype=torch.float64)
    compiled_ok = C.available()
    for kind in KINDS:
        st_c, st_e = State(shapes, seed), State(shapes, seed)
        h_c, e_c = run_kernel(kind, st_c, a, 0.01, True, False)
        saved = os.environ.get(C.ENV_SWITCH)
        os.environ[C.ENV_SWITCH] = "0"
        C.reset()
        try:
            assert not C.available()
            h_e, e_e = run_kernel(kind, st_e, a, 0.01, True, False)
        finally:
            if saved is None:
                del os.environ[C.ENV_SWITCH]
            else:
                os.environ[C.ENV_SWITCH] = saved
            C.reset()
        out[kind] = {
            "compiled": compiled_ok,
            "w max abs (compiled - eager)": diffs(st_c.w, st_e.w)[0],
            "E max abs": diffs(e_c, e_e)[0],
            "h rel": abs(h_c - h_e) / abs(h_e) if h_e else abs(h_c),
        }
    # a compiler that fails: available() must say False, once, without raising
    real = torch.compile

    def broken(*args: Any, **kwargs: Any) -> Any:
        raise RuntimeError("simulated: no C++ compiler")

    C.reset()
    torch.compile = broken  # type: ignore[assignment]
    try:
        out["simulated failure: available()"] = C.available()
        st = State(shapes, seed)
        h, _ = run_kernel("lagged 1-pass", st, a, 0.0, False, False)
        out["simulated failure: step ran eagerly"] = math.isfinite(h)
    finally:
        torch.compile = real
        C.reset()
    return out


# --------------------------------------------------------------------------- timing


def make_contenders(n_params: int, seed: int) -> tuple[dict[str, Callable[[], Any]], dict[str, float], dict[str, Any]]:
    shapes = model_shapes(n_params)
    base = State(shapes, seed, steps=0.0)
    for t in base.m + base.v + base.e:
        t.zero_()
    actions: dict[str, Callable[[], Any]] = {}
    compile_s: dict[str, float] = {}
    keep: dict[str, Any] = {}

    def torch_adam(**kw: Any) -> Callable[[], Any]:
        params = [nn.Parameter(w.clone()) for w in base.w]
        for p, g in zip(params, base.g, strict=True):
            p.grad = g.clone()
        opt = torch.optim.Adam(params, lr=LR, **kw)
        keep[str(kw)] = opt
        return opt.step

    actions["torch Adam fused"] = torch_adam(fused=True)
    actions["torch Adam foreach"] = torch_adam(foreach=True)

    params = [nn.Parameter(w.clone()) for w in base.w]
    for p, g in zip(params, base.g, strict=True):
        p.grad = g.clone()
    tower = TowerAdam(params, lr=LR)
    keep["tower"] = tower
    for _ in range(TOWER_SKIP):
        tower.step()
    actions["TowerAdam default"] = tower.step

    a = torch.tensor(LR, dtype=torch.float64)
    args = (BETA1, BETA2, EPS, 0.0, False, False, TRAIL_WEIGHT)
    for kind in KINDS:
        st = base.clone()
        keep[kind] = st
        if kind == "two-pass":

            def act(st: State = st) -> Any:
                torch._foreach_add_(st.steps, 1)
                h = C.two_pass_dot(st.g, st.e)
                C.adam_trail_update(st.w, st.g, st.m, st.v, st.e, st.steps, a, *args)
                return h

        elif kind == "lagged 1-pass":

            def act(st: State = st) -> Any:
                torch._foreach_add_(st.steps, 1)
                h = lagged_adam_trail(st.w, st.g, st.m, st.v, st.e, st.steps, a, *args, emas_out=st.e2)
                st.e, st.e2 = st.e2, st.e
                return h

        else:

            def act(st: State = st) -> Any:
                torch._foreach_add_(st.steps, 1)
                return lagged_adam_trail(st.w, st.g, st.m, st.v, st.e, st.steps, a, *args)

        t0 = time.perf_counter()
        act()
        first = time.perf_counter() - t0
        t0 = time.perf_counter()
        act()
        compile_s[kind] = first - (time.perf_counter() - t0)
        actions[kind] = act
    return actions, compile_s, {"tensors": len(shapes), "params": sum(math.prod(s) for s in shapes), "keep": keep}


def round_robin(actions: dict[str, Callable[[], Any]], warmup: int, rounds: int) -> dict[str, list[float]]:
    for _ in range(warmup):
        for act in actions.values():
            act()
    samples: dict[str, list[float]] = {k: [] for k in actions}
    names = list(actions)
    gc.collect()
    gc.disable()
    try:
        for r in range(rounds):
            order = names[r % len(names) :] + names[: r % len(names)]
            for name in order:
                t0 = time.perf_counter()
                actions[name]()
                samples[name].append(time.perf_counter() - t0)
    finally:
        gc.enable()
    return samples


def bench(n_params: int, seed: int, warmup: int, rounds: int) -> dict[str, Any]:
    actions, compile_s, info = make_contenders(n_params, seed)
    samples = round_robin(actions, warmup, rounds)
    ref_med = statistics.median(samples["torch Adam fused"])
    ref_min = min(samples["torch Adam fused"])
    rows = {}
    for name, s in samples.items():
        med, mn = statistics.median(s), min(s)
        rows[name] = {
            "median_ms": 1e3 * med,
            "min_ms": 1e3 * mn,
            "ratio_median": med / ref_med,
            "ratio_min": mn / ref_min,
            "n": len(s),
        }
    tower = info["keep"]["tower"]
    out = {
        "params": info["params"],
        "tensors": info["tensors"],
        "compile_s": compile_s,
        "rows": rows,
        "tower_skipped": tower.skipped_steps(),
        "tower_retreats": tower.retreats(),
    }
    del actions, info
    gc.collect()
    return out


# --------------------------------------------------------------------------- report


def gcc_version() -> str:
    try:
        return subprocess.run(["g++", "--version"], capture_output=True, text=True, check=False).stdout.split("\n")[0]
    except OSError:
        return "none"


def human(n: float) -> str:
    for unit, scale in (("G", 1e9), ("M", 1e6), ("k", 1e3)):
        if n >= scale:
            return f"{n / scale:.3g}{unit}"
    return f"{n:.0f}"


def table(rows: list[dict[str, Any]], keys: list[str]) -> list[str]:
    lines = ["| " + " | ".join(keys) + " |", "|" + "---|" * len(keys)]
    for r in rows:
        cells = [f"{r[k]:.2e}" if isinstance(r[k], float) else str(r[k]) for k in keys]
        lines.append("| " + " | ".join(cells) + " |")
    return lines


def markdown(report: dict[str, Any]) -> str:
    env = report["environment"]
    lines = [
        "# Compiled fused passes for the Adam step with the trail",
        "",
        f"torch {env['torch']}, {env['threads']} thread(s), CPU: {env['cpu_model']} ({env['cpu_count']} logical "
        f"cores), {env['gcc']}; torch.compile available: {env['compiled']}. "
        f"Load average at start: {env['loadavg']}.",
        "",
        "## Step time (round-robin, ms; ratios to torch fused Adam)",
        "",
    ]
    for s in report["sizes"]:
        lines += [
            f"### {human(s['params'])} parameters, {s['tensors']} tensors, n={s['rows']['torch Adam fused']['n']}",
            "",
            "| step | median ms | min ms | ratio (median) | ratio (min) |",
            "|---|---|---|---|---|",
        ]
        for name, r in s["rows"].items():
            ratios = f"{r['ratio_median']:.2f} | {r['ratio_min']:.2f}"
            lines.append(f"| {name} | {r['median_ms']:.3g} | {r['min_ms']:.3g} | {ratios} |")
        comp = ", ".join(f"{k} {v:.1f} s" for k, v in s["compile_s"].items())
        lines += ["", f"First call minus a warm call (compile time): {comp}.", ""]
        if s["tower_skipped"] or s["tower_retreats"]:
            lines.append(f"TowerAdam: {s['tower_skipped']} skipped, {s['tower_retreats']} retreats.")
            lines.append("")
    lines += ["## Against a float64 reference (one step)", ""]
    keys = ["case", "kernel", "w rel", "m rel", "v rel", "E rel", "E elem rel", "h rel", "h rel (float32 torch.dot)"]
    lines += table(report["reference"], keys)
    lines += [
        "",
        "rel: max |diff| / max |ref| over all tensors; elem rel: largest elementwise relative difference "
        "(entries above 1e-6 of the largest).",
        "",
        "## Against torch.optim Adam / AdamW (w, m, v after several steps, fixed step size)",
        "",
    ]
    lines += table(report["torch_optim"], ["case", "torch", "kernel", "steps", "w abs", "w rel", "m rel", "v rel"])
    lines += [
        "",
        "## Recompiles when a and the step counts change",
        "",
        "```",
        json.dumps(report["recompiles"], indent=1),
    ]
    lines += ["```", "", "## Fusion (loops over each tensor's full length in the generated C++)", "", "```"]
    lines += [json.dumps(report["fusion"], indent=1), "```", "", "## Fallback (eager) and a simulated compiler failure"]
    lines += ["", "```", json.dumps(report["fallback"], indent=1), "```", ""]
    return "\n".join(lines)


# --------------------------------------------------------------------------- main


def parse_args(argv: list[str] | None = None) -> argparse.Namespace:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--sizes", type=float, nargs="+", default=[1e6, 1e7], help="total parameter counts")
    ap.add_argument("--rounds", type=int, default=30, help="timed round-robin rounds (default: 30)")
    ap.add_argument("--warmup", type=int, default=3, help="untimed rounds first (default: 3)")
    ap.add_argument("--threads", type=int, default=1, help="torch.set_num_threads (default: 1)")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--cold", action="store_true", help="disable inductor's on-disk caches (first-run compile times)")
    ap.add_argument("--skip-checks", action="store_true", help="timing only")
    ap.add_argument("--quick", action="store_true", help="smoke test: small sizes, few rounds")
    ap.add_argument("--out", type=Path, default=Path("experiments/out/fused_pass"))
    return ap.parse_args(argv)


def main(argv: list[str] | None = None) -> dict[str, Any]:
    args = parse_args(argv)
    torch.set_num_threads(args.threads)
    if args.cold:
        torch._inductor.config.force_disable_caches = True
    if args.quick:
        args.sizes, args.rounds, args.warmup = [1e5, 3e5], 5, 1
    report: dict[str, Any] = {
        "environment": {
            **environment(),
            "gcc": gcc_version(),
            "loadavg": " ".join(f"{x:.2f}" for x in os.getloadavg()),
            "compiled": C.available(),
        },
        "config": vars(args) | {"out": str(args.out), "argv": sys.argv},
        "sizes": [],
    }
    t_start = time.perf_counter()
    shapes = [(96, 80), (80,), (33, 7), (7,)]  # odd sizes: vector tails
    if not args.skip_checks:
        report["reference"] = check_reference(shapes, args.seed)
        report["torch_optim"] = check_torch_optim(shapes, args.seed)
        report["recompiles"] = check_recompiles(shapes, args.seed)
        report["fallback"] = check_fallback(shapes, args.seed)
        report["fusion"] = check_fusion(args.seed)
        print(f"[fused_pass] checks: {time.perf_counter() - t_start:.1f} s", file=sys.stderr)
    for n in sorted(int(s) for s in args.sizes):
        t0 = time.perf_counter()
        report["sizes"].append(bench(n, args.seed, args.warmup, args.rounds))
        print(f"[fused_pass] {human(n)}: {time.perf_counter() - t0:.1f} s", file=sys.stderr)
    report["elapsed_s"] = time.perf_counter() - t_start
    if args.skip_checks:
        for key in ("reference", "torch_optim"):
            report[key] = []
        for key in ("recompiles", "fusion", "fallback"):
            report[key] = {}
    args.out.mkdir(parents=True, exist_ok=True)
    md = markdown(report)
    (args.out / "results.md").write_text(md)
    (args.out / "results.json").write_text(json.dumps(report, indent=2, default=str))
    print(md)
    return report


if __name__ == "__main__":
    main()
