"""Step cost of the tower optimizers against ``torch.optim``, measured in one process.

What it measures
    * The median wall time (and interquartile range) of ``optimizer.step()`` alone for
      torch ``Adam`` (foreach and fused), ``TowerAdam`` at depth 0-3 (and with
      ``compiled=True`` where torch.compile works, ``native=False``: the reference path
      where the default takes the native C++ kernel, and ``lagged=False``: the exact
      hypergradient, a read pass of its own), ``TowerAdamW``
      (default depth), torch ``SGD(momentum=0.9)`` (foreach, and fused where torch
      supports it on this device) and ``TowerSGD(momentum=0.9)`` at depth 0, the
      default depth and with ``lagged=True``. Parameters are float32, split like a model: a stack of square
      ``Linear`` weight matrices plus their biases, at each ``--sizes`` total count.
      Every optimizer owns its own copy of the parameters and of one fixed random
      gradient, set once; after a warm-up, the optimizers are timed round-robin (one
      step each per repeat) so they share the machine's noise.
    * The optimizer-state memory: bytes of every tensor in ``opt.state`` and in each
      group's ``"tower"`` dict, and the extra bytes against torch ``Adam`` (Adam family)
      or torch ``SGD`` (SGD family).
    * One training iteration (forward + backward + step) of an MLP of about 10M
      parameters at batch 32, torch ``Adam(fused=True)`` against ``TowerAdam`` default,
      also round-robin. This counts work that a step might move into backward.

How to run
    .venv/bin/python experiments/step_cost.py                   # 1M, 10M, 50M; a few minutes
    .venv/bin/python experiments/step_cost.py --quick           # smoke test, seconds
    .venv/bin/python experiments/step_cost.py --sizes 1e6 1e7 --repeats 30 --threads 1

    Each size runs --repeats rounds (default 20), cut to about --budget-s seconds (default
    60) of timed rounds if they are slow, so the default run stays within a few minutes.

    Output goes to ``--out`` (default ``experiments/out/step_cost``): ``results.md`` (also
    printed), ``results.csv`` (one row per size and optimizer), ``results.json`` (all of
    it, plus torch version, thread count and CPU model) and ``step_time.png``.
    Run it on a quiet machine: timings on a shared one are only indicative.

How to read the ratios (medians, same process, same sizes)
    * ``TowerAdam / fused Adam`` and ``TowerAdam / foreach Adam``: the cost of the default
      tower against the two torch Adam implementations. 1.0 means the same step time.
    * ``level k -> k+1``: ``(t[depth k+1] - t[depth k]) / t[depth k]`` for TowerAdam. The
      first level adds the read-only probe pass over the parameters; levels above it are
      scalar work, so their cost should be near 0 (within noise).
    * ``TowerAdam depth 0 / fused Adam``: the overhead of the tower machinery with no
      levels (should be near 1).
    * ``TowerSGD / torch SGD``: the default tower on heavy-ball SGD against torch's
      foreach (and fused) SGD.
    * The IQR beside each median says how much to trust a ratio: a difference smaller
      than the IQRs of the two medians is noise. On a loaded machine, ``--threads 1``
      avoids stalls of torch's thread pool, and the minimum (in the CSV/JSON) is a
      steadier lower bound than the median.
"""

from __future__ import annotations

import argparse
import csv
import gc
import itertools
import json
import math
import os
import platform
import resource
import statistics
import sys
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import torch
from torch import Tensor, nn

import stepsize_tower
from stepsize_tower import DEFAULT_DEPTH, TowerAdam, TowerAdamW, TowerSGD
from stepsize_tower.bases import compiled as _compiled
from stepsize_tower.bases import native as _native

ADAM_LR = 1e-3
MIN_REPEATS = 5
SGD_LR = 1e-2
MOMENTUM = 0.9


# --------------------------------------------------------------------------- environment


def cpu_model() -> str:
    try:
        with open("/proc/cpuinfo") as f:
            for line in f:
                if line.startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or "unknown"


def environment() -> dict[str, Any]:
    return {
        "torch": torch.__version__,
        "stepsize_tower": stepsize_tower.__version__,
        "python": platform.python_version(),
        "threads": torch.get_num_threads(),
        "cpu_count": os.cpu_count(),
        "cpu_model": cpu_model(),
        "default_depth": DEFAULT_DEPTH,
        "platform": platform.platform(),
        "load_average_start": os.getloadavg(),
    }


# --------------------------------------------------------------------------- optimizers


@dataclass(frozen=True)
class Spec:
    """One optimizer under test: a name, a family (for the memory reference) and a factory."""

    name: str
    family: str  # "adam" or "sgd"
    make: Callable[[list[Tensor]], torch.optim.Optimizer]


def fused_sgd_supported() -> bool:
    p = nn.Parameter(torch.zeros(4))
    p.grad = torch.ones(4)
    try:
        torch.optim.SGD([p], lr=SGD_LR, momentum=MOMENTUM, fused=True).step()
    except (RuntimeError, ValueError, TypeError):
        return False
    return True


#: The small end-to-end model: an MLP of about 85k parameters.
SMALL_MLP = [64, 256, 256, 10]


def optimizer_specs() -> list[Spec]:
    specs = [
        Spec("torch Adam foreach", "adam", lambda ps: torch.optim.Adam(ps, lr=ADAM_LR, foreach=True)),
        Spec("torch Adam fused", "adam", lambda ps: torch.optim.Adam(ps, lr=ADAM_LR, fused=True)),
    ]
    for depth in range(4):
        label = f"TowerAdam d{depth}" + (" (default)" if depth == DEFAULT_DEPTH else "")
        specs.append(Spec(label, "adam", lambda ps, d=depth: TowerAdam(ps, lr=ADAM_LR, depth=d)))
    specs.append(Spec(f"TowerAdamW d{DEFAULT_DEPTH} (default)", "adam", lambda ps: TowerAdamW(ps, lr=ADAM_LR)))
    if _compiled.available():
        specs.append(Spec("TowerAdam compiled=True", "adam", lambda ps: TowerAdam(ps, lr=ADAM_LR, compiled=True)))
    if _native.available():  # builds the kernel on the first run (tens of seconds), then loads it
        specs.append(Spec("TowerAdam native=False", "adam", lambda ps: TowerAdam(ps, lr=ADAM_LR, native=False)))
        specs.append(Spec("TowerAdam lagged=False", "adam", lambda ps: TowerAdam(ps, lr=ADAM_LR, lagged=False)))
    specs.append(
        Spec(
            "torch SGD foreach",
            "sgd",
            lambda ps: torch.optim.SGD(ps, lr=SGD_LR, momentum=MOMENTUM, foreach=True),
        )
    )
    if fused_sgd_supported():
        specs.append(
            Spec(
                "torch SGD fused",
                "sgd",
                lambda ps: torch.optim.SGD(ps, lr=SGD_LR, momentum=MOMENTUM, fused=True),
            )
        )
    specs.append(Spec("TowerSGD d0", "sgd", lambda ps: TowerSGD(ps, lr=SGD_LR, momentum=MOMENTUM, depth=0)))
    specs.append(
        Spec(f"TowerSGD d{DEFAULT_DEPTH} (default)", "sgd", lambda ps: TowerSGD(ps, lr=SGD_LR, momentum=MOMENTUM))
    )
    specs.append(
        Spec("TowerSGD lagged=True", "sgd", lambda ps: TowerSGD(ps, lr=SGD_LR, momentum=MOMENTUM, lagged=True))
    )
    return specs


def find(specs_or_names: list[str], prefix: str) -> str | None:
    for name in specs_or_names:
        if name.startswith(prefix):
            return name
    return None


# --------------------------------------------------------------------------- parameters


def layer_shapes(n_params: int) -> tuple[int, int]:
    """``(width, layers)`` of a stack of square Linear layers (weight + bias) with about ``n_params``."""
    width = 2 ** max(3, round(math.log2(math.sqrt(n_params / 8))))
    layers = max(1, round(n_params / (width * width + width)))
    return width, layers


def make_tensors(n_params: int, seed: int) -> tuple[list[Tensor], list[Tensor]]:
    """Initial values and one fixed random gradient for every tensor of the stack."""
    width, layers = layer_shapes(n_params)
    gen = torch.Generator().manual_seed(seed)
    values, grads = [], []
    for _ in range(layers):
        for shape in ((width, width), (width,)):
            values.append(torch.randn(shape, generator=gen) / math.sqrt(width))
            grads.append(torch.randn(shape, generator=gen) * 1e-2)
    return values, grads


def state_bytes(opt: torch.optim.Optimizer) -> int:
    """Bytes of every tensor the optimizer keeps: per-parameter state and per-group tower state."""
    total = 0

    def add(obj: Any) -> None:
        nonlocal total
        if isinstance(obj, Tensor):
            total += obj.numel() * obj.element_size()
        elif isinstance(obj, dict):
            for v in obj.values():
                add(v)
        elif isinstance(obj, (list, tuple)):
            for v in obj:
                add(v)

    for st in opt.state.values():
        add(st)
    for group in opt.param_groups:
        add(group.get("tower"))
    return total


def tower_counters(opt: torch.optim.Optimizer) -> dict[str, Any]:
    if not isinstance(opt, stepsize_tower.TowerOptimizer):
        return {}
    return {
        "skipped": opt.skipped_steps(),
        "retreats": opt.retreats(),
        "step_size": opt.step_sizes()[0][0],
    }


# --------------------------------------------------------------------------- timing


def summarize(samples: list[float]) -> dict[str, float]:
    qs = statistics.quantiles(samples, n=4, method="inclusive") if len(samples) > 1 else [samples[0]] * 3
    return {
        "median_ms": 1e3 * statistics.median(samples),
        "q1_ms": 1e3 * qs[0],
        "q3_ms": 1e3 * qs[2],
        "iqr_ms": 1e3 * (qs[2] - qs[0]),
        "min_ms": 1e3 * min(samples),
        "n": len(samples),
    }


def round_robin(
    actions: dict[str, Callable[[], Any]], warmup: int, repeats: int, budget_s: float | None = None
) -> dict[str, list[float]]:
    """Run every action ``warmup`` times, then time each once per repeat, in turn.

    With ``budget_s``, the repeats are cut (to no fewer than ``MIN_REPEATS``) so that the
    timed rounds take about that long, judged from the last warm-up round.
    """
    round_s = 0.0
    for _ in range(max(1, warmup)):
        t0 = time.perf_counter()
        for act in actions.values():
            act()
        round_s = time.perf_counter() - t0
    if budget_s is not None and round_s > 0:
        repeats = min(repeats, max(MIN_REPEATS, int(budget_s / round_s)))
    samples: dict[str, list[float]] = {name: [] for name in actions}
    gc.collect()
    gc_was_enabled = gc.isenabled()
    gc.disable()
    try:
        for r in range(repeats):
            # rotate the start so no optimizer always follows the same one
            names = list(actions)
            names = names[r % len(names) :] + names[: r % len(names)]
            for name in names:
                act = actions[name]
                t0 = time.perf_counter()
                act()
                samples[name].append(time.perf_counter() - t0)
    finally:
        if gc_was_enabled:
            gc.enable()
    return samples


def bench_steps(
    n_params: int, specs: list[Spec], warmup: int, repeats: int, seed: int, budget_s: float | None
) -> dict[str, Any]:
    values, grads = make_tensors(n_params, seed)
    actual = sum(v.numel() for v in values)
    opts: dict[str, torch.optim.Optimizer] = {}
    for spec in specs:
        params = [nn.Parameter(v.clone()) for v in values]
        for p, g in zip(params, grads, strict=True):
            p.grad = g.clone()
        opts[spec.name] = spec.make(params)
    del values, grads
    samples = round_robin({name: opt.step for name, opt in opts.items()}, warmup, repeats, budget_s)
    out: dict[str, Any] = {
        "params": actual,
        "tensors": 2 * layer_shapes(n_params)[1],
        "width": layer_shapes(n_params)[0],
    }
    rows = {}
    for spec in specs:
        opt = opts[spec.name]
        rows[spec.name] = {**summarize(samples[spec.name]), "state_bytes": state_bytes(opt), **tower_counters(opt)}
    out["optimizers"] = rows
    del opts
    gc.collect()
    return out


def mlp(dims: list[int]) -> nn.Sequential:
    layers: list[nn.Module] = []
    for i in range(len(dims) - 1):
        layers.append(nn.Linear(dims[i], dims[i + 1]))
        if i < len(dims) - 2:
            layers.append(nn.ReLU())
    return nn.Sequential(*layers)


#: Distinct batches the end-to-end iteration cycles through (random inputs and labels).
E2E_BATCHES = 64


def bench_end_to_end(dims: list[int], batch: int, warmup: int, repeats: int, seed: int) -> dict[str, Any]:
    torch.manual_seed(seed)
    base = mlp(dims)
    # A stream of batches, the same for every optimizer: one batch repeated is memorized within
    # a few dozen Adam steps, and its vanishing gradients go subnormal, which slows forward and
    # backward on a CPU by up to 2x (measured: the iteration then timed the denormals, not the step).
    stream = [(torch.randn(batch, dims[0]), torch.randint(0, dims[-1], (batch,))) for _ in range(E2E_BATCHES)]
    loss_fn = nn.CrossEntropyLoss()
    makers: dict[str, Callable[[Any], torch.optim.Optimizer]] = {
        "torch Adam fused": lambda ps: torch.optim.Adam(ps, lr=ADAM_LR, fused=True),
        "torch Adam foreach": lambda ps: torch.optim.Adam(ps, lr=ADAM_LR, foreach=True),
        f"TowerAdam d{DEFAULT_DEPTH} (default)": lambda ps: TowerAdam(ps, lr=ADAM_LR),
    }
    if _compiled.available() and sum(dims[i] * dims[i + 1] for i in range(len(dims) - 1)) >= 1e6:
        makers["TowerAdam compiled=True"] = lambda ps: TowerAdam(ps, lr=ADAM_LR, compiled=True)
    if _native.available():
        makers["TowerAdam native=False"] = lambda ps: TowerAdam(ps, lr=ADAM_LR, native=False)
    makers["torch SGD(momentum) fused"] = lambda ps: torch.optim.SGD(ps, lr=SGD_LR, momentum=MOMENTUM, fused=True)
    makers[f"TowerSGD(momentum) d{DEFAULT_DEPTH} (default)"] = lambda ps: TowerSGD(ps, lr=SGD_LR, momentum=MOMENTUM)
    actions: dict[str, Callable[[], Any]] = {}
    opts = {}
    for name, make in makers.items():
        model = mlp(dims)
        model.load_state_dict(base.state_dict())
        opt = make(model.parameters())
        opts[name] = opt

        cycle = itertools.cycle(stream)

        def iteration(
            model: nn.Module = model, opt: torch.optim.Optimizer = opt, batches: Iterator[Any] = cycle
        ) -> None:
            x, y = next(batches)
            opt.zero_grad(set_to_none=True)
            loss_fn(model(x), y).backward()
            opt.step()

        actions[name] = iteration
    samples = round_robin(actions, warmup, repeats)
    n = sum(p.numel() for p in base.parameters())
    return {
        "params": n,
        "dims": dims,
        "batch": batch,
        "optimizers": {name: {**summarize(samples[name]), **tower_counters(opts[name])} for name in makers},
    }


# --------------------------------------------------------------------------- report


def human(n: float) -> str:
    for unit, scale in (("G", 1e9), ("M", 1e6), ("k", 1e3)):
        if n >= scale:
            return f"{n / scale:.3g}{unit}"
    return f"{n:.0f}"


def ratio(results: dict[str, Any], a: str | None, b: str | None, key: str = "median_ms") -> float | None:
    if a is None or b is None or a not in results or b not in results:
        return None
    return results[a][key] / results[b][key]


def ratios_for(rows: dict[str, Any]) -> dict[str, float | None]:
    names = list(rows)
    tower = find(names, f"TowerAdam d{DEFAULT_DEPTH}")
    exact = find(names, "TowerAdam lagged=F")
    reference = find(names, "TowerAdam native=F")
    out: dict[str, float | None] = {
        "TowerAdam default / torch Adam fused": ratio(rows, tower, "torch Adam fused"),
        "TowerAdam default / torch Adam foreach": ratio(rows, tower, "torch Adam foreach"),
        "TowerAdam d0 / torch Adam fused": ratio(rows, find(names, "TowerAdam d0"), "torch Adam fused"),
        "TowerAdamW default / torch Adam fused": ratio(rows, find(names, "TowerAdamW"), "torch Adam fused"),
        "TowerAdam compiled / torch Adam fused": ratio(rows, find(names, "TowerAdam compiled"), "torch Adam fused"),
        "TowerAdam compiled / torch Adam foreach": ratio(rows, find(names, "TowerAdam compiled"), "torch Adam foreach"),
        "TowerAdam native=False / torch Adam fused": ratio(rows, reference, "torch Adam fused"),
        "TowerAdam native=False / torch Adam foreach": ratio(rows, reference, "torch Adam foreach"),
        "TowerAdam lagged=False / torch Adam fused": ratio(rows, exact, "torch Adam fused"),
    }
    # Minimums: a steadier lower bound than medians on a shared machine.
    native_runs = (("TowerAdam native=False", reference), ("TowerAdam lagged=False", exact))
    for label, name in (("TowerAdam default", tower), *native_runs):
        out[f"{label} / torch Adam fused (minimums)"] = ratio(rows, name, "torch Adam fused", "min_ms")
    for k in range(3):
        lo, hi = find(names, f"TowerAdam d{k}"), find(names, f"TowerAdam d{k + 1}")
        r = ratio(rows, hi, lo)
        out[f"TowerAdam level {k} -> {k + 1}: (t{k + 1} - t{k}) / t{k}"] = None if r is None else r - 1
    sgd_tower = find(names, f"TowerSGD d{DEFAULT_DEPTH}")
    out["TowerSGD default / torch SGD foreach"] = ratio(rows, sgd_tower, "torch SGD foreach")
    out["TowerSGD default / torch SGD fused"] = ratio(rows, sgd_tower, "torch SGD fused")
    out["TowerSGD lagged=True / torch SGD fused"] = ratio(rows, find(names, "TowerSGD lagged=T"), "torch SGD fused")
    out["TowerSGD d0 / torch SGD foreach"] = ratio(rows, find(names, "TowerSGD d0"), "torch SGD foreach")
    return out


def fmt(x: float | None, spec: str = ".2f") -> str:
    return "n/a" if x is None else format(x, spec)


def _loads(triple: Any) -> str:
    return "n/a" if not triple else "/".join(f"{x:.2f}" for x in triple)


def markdown(report: dict[str, Any]) -> str:
    env, sizes = report["environment"], report["sizes"]
    lines = [
        "# Step cost against torch.optim",
        "",
        f"torch {env['torch']}, {env['threads']} threads, CPU: {env['cpu_model']} "
        f"({env['cpu_count']} logical cores); stepsize_tower {env['stepsize_tower']}, "
        f"default depth {env['default_depth']}. Warm-up {report['config']['warmup']} steps, then "
        f"n timed steps per optimizer (in the column header), round-robin in one process. "
        f"Peak RSS {report.get('peak_rss_mb', 0):.0f} MB. Load average (1/5/15 min) at the start "
        f"{_loads(env.get('load_average_start'))}, at the end {_loads(env.get('load_average_end'))}.",
        "",
        "## step() time, median ms (IQR) and minimum",
        "",
    ]
    header = ["optimizer"] + [
        f"{human(s['params'])} ({s['tensors']} tensors, n={next(iter(s['optimizers'].values()))['n']})" for s in sizes
    ]
    lines += ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
    names = list(sizes[0]["optimizers"]) if sizes else []
    for name in names:
        cells = [name]
        for s in sizes:
            r = s["optimizers"][name]
            cells.append(f"{r['median_ms']:.3g} ({r['iqr_ms']:.2g}), min {r['min_ms']:.3g}")
        lines.append("| " + " | ".join(cells) + " |")

    lines += ["", "## Ratios of medians", "", "| ratio | " + " | ".join(human(s["params"]) for s in sizes) + " |"]
    lines.append("|" + "---|" * (len(sizes) + 1))
    keys = list(sizes[0]["ratios"]) if sizes else []
    for key in keys:
        if all(s["ratios"][key] is None for s in sizes):
            continue  # a contender left out (--only) or unavailable here
        lines.append("| " + key + " | " + " | ".join(fmt(s["ratios"][key]) for s in sizes) + " |")

    lines += [
        "",
        "## Optimizer state (largest size)",
        "",
        "| optimizer | state MB | extra MB vs torch reference | ratio to reference |",
        "|---|---|---|---|",
    ]
    if sizes:
        last = sizes[-1]["optimizers"]
        ref = {"adam": last.get("torch Adam fused"), "sgd": last.get("torch SGD foreach")}
        for spec_name, row in last.items():
            family = "sgd" if "SGD" in spec_name else "adam"
            ref_row = ref[family]
            ref_bytes = ref_row["state_bytes"] if ref_row else None
            extra = None if ref_bytes is None else (row["state_bytes"] - ref_bytes) / 1e6
            rel = None if not ref_bytes else row["state_bytes"] / ref_bytes
            lines.append(f"| {spec_name} | {row['state_bytes'] / 1e6:.2f} | {fmt(extra, '+.4f')} | {fmt(rel, '.4f')} |")
        lines.append("")
        lines.append("Reference: torch Adam for the Adam family, torch SGD(momentum) for the SGD family.")

    for e2e in report.get("end_to_end") or []:
        lines += [
            "",
            f"## One training iteration (forward + backward + step): MLP {e2e['dims']}, "
            f"{human(e2e['params'])} parameters, batch {e2e['batch']}",
            "",
            "| optimizer | median ms (IQR) | ratio to torch Adam fused |",
            "|---|---|---|",
        ]
        base = e2e["optimizers"]["torch Adam fused"]["median_ms"]
        for name, r in e2e["optimizers"].items():
            lines.append(f"| {name} | {r['median_ms']:.3g} ({r['iqr_ms']:.2g}) | {r['median_ms'] / base:.2f} |")

    notes = []
    for s in sizes:
        for name, r in s["optimizers"].items():
            if r.get("skipped") or r.get("retreats"):
                notes.append(
                    f"{human(s['params'])} {name}: {r['skipped']} skipped, {r['retreats']} retreats "
                    "(those steps did less work; timings are biased low)"
                )
    if notes:
        lines += ["", "## Warnings", "", *[f"- {n}" for n in notes]]
    lines.append("")
    return "\n".join(lines)


def write_csv(path: Path, report: dict[str, Any]) -> None:
    fields = ["params", "tensors", "optimizer", "median_ms", "q1_ms", "q3_ms", "iqr_ms", "min_ms", "n", "state_bytes"]
    with path.open("w", newline="") as f:
        w = csv.DictWriter(f, fieldnames=fields)
        w.writeheader()
        for s in report["sizes"]:
            for name, r in s["optimizers"].items():
                w.writerow(
                    {"params": s["params"], "tensors": s["tensors"], "optimizer": name} | {k: r[k] for k in fields[3:]}
                )


def plot(path: Path, report: dict[str, Any]) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(8, 5.5))
    sizes = report["sizes"]
    xs = [s["params"] for s in sizes]
    colors = [*plt.get_cmap("tab10").colors, "black", "olive"]
    for i, name in enumerate(sizes[0]["optimizers"]):
        ys = [s["optimizers"][name]["median_ms"] for s in sizes]
        lo = [s["optimizers"][name]["q1_ms"] for s in sizes]
        hi = [s["optimizers"][name]["q3_ms"] for s in sizes]
        style = "-" if name.startswith("Tower") else "--"
        marker = "s" if "SGD" in name else "o"
        (line,) = ax.plot(xs, ys, style, marker=marker, color=colors[i % len(colors)], label=name)
        ax.fill_between(xs, lo, hi, color=line.get_color(), alpha=0.15)
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel("parameters (float32)")
    ax.set_ylabel("step() time, median ms")
    env = report["environment"]
    ax.set_title(f"Step time, torch {env['torch']}, {env['threads']} threads", fontsize=10)
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=7, loc="upper left")
    fig.tight_layout()
    fig.savefig(path, dpi=120)
    plt.close(fig)


# --------------------------------------------------------------------------- main


def parse_args(argv: list[str] | None = None) -> argparse.Namespace:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--sizes", type=float, nargs="+", default=[1e6, 1e7, 5e7], help="total parameter counts")
    ap.add_argument("--repeats", type=int, default=20, help="timed steps per optimizer and size (default: 20)")
    ap.add_argument(
        "--budget-s",
        type=float,
        default=60.0,
        help="cut the repeats of one size to about this many seconds of timed rounds, "
        f"at least {MIN_REPEATS}; 0 for no cut (default: 60)",
    )
    ap.add_argument(
        "--warmup", type=int, default=12, help="untimed steps per optimizer, past the start-up window (default: 12)"
    )
    ap.add_argument("--e2e-repeats", type=int, default=30, help="timed iterations of the MLP (default: 30)")
    ap.add_argument("--no-e2e", action="store_true", help="skip the end-to-end MLP iteration")
    ap.add_argument("--threads", type=int, default=None, help="torch.set_num_threads (default: torch's choice)")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--out", type=Path, default=Path("experiments/out/step_cost"))
    ap.add_argument(
        "--only",
        nargs="+",
        default=None,
        help='time only the optimizers whose names start with one of these, e.g. --only "torch Adam" '
        '"TowerAdam d1" "TowerAdam native" (default: all)',
    )
    ap.add_argument("--quick", action="store_true", help="smoke test: small sizes, few repeats, small MLP")
    return ap.parse_args(argv)


def main(argv: list[str] | None = None) -> dict[str, Any]:
    args = parse_args(argv)
    if args.threads:
        torch.set_num_threads(args.threads)
    if args.quick:
        args.sizes, args.repeats, args.warmup, args.e2e_repeats = [1e5, 3e5], 5, 2, 5
    e2e_dims = [256, 512, 512, 256, 10] if args.quick else [1536, 2048, 2048, 1536, 10]
    sizes = sorted(int(s) for s in args.sizes)
    specs = [s for s in optimizer_specs() if not args.only or any(s.name.startswith(p) for p in args.only)]
    report: dict[str, Any] = {
        "environment": environment(),
        "config": {
            "sizes": sizes,
            "repeats": args.repeats,
            "warmup": args.warmup,
            "budget_s": args.budget_s,
            "threads_arg": args.threads,
            "e2e_repeats": args.e2e_repeats,
            "seed": args.seed,
            "quick": args.quick,
            "adam_lr": ADAM_LR,
            "sgd_lr": SGD_LR,
            "momentum": MOMENTUM,
            "optimizers": [s.name for s in specs],
            "argv": sys.argv,
        },
        "sizes": [],
    }
    t_start = time.perf_counter()
    for n in sizes:
        t0 = time.perf_counter()
        res = bench_steps(n, specs, args.warmup, args.repeats, args.seed, args.budget_s or None)
        res["ratios"] = ratios_for(res["optimizers"])
        report["sizes"].append(res)
        print(f"[step_cost] {human(res['params'])} parameters: {time.perf_counter() - t0:.1f} s", file=sys.stderr)
    if not args.no_e2e:
        t0 = time.perf_counter()
        report["end_to_end"] = [
            bench_end_to_end(e2e_dims, 32, args.warmup, args.e2e_repeats, args.seed),
            # A laptop-sized model, where per-step overhead (not memory traffic) decides.
            bench_end_to_end(SMALL_MLP, 32, max(args.warmup, 12), 10 * args.e2e_repeats, args.seed),
        ]
        print(f"[step_cost] end-to-end MLP: {time.perf_counter() - t0:.1f} s", file=sys.stderr)
    report["elapsed_s"] = time.perf_counter() - t_start
    report["environment"]["load_average_end"] = os.getloadavg()
    report["peak_rss_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # KiB on Linux

    args.out.mkdir(parents=True, exist_ok=True)
    md = markdown(report)
    (args.out / "results.md").write_text(md)
    (args.out / "results.json").write_text(json.dumps(report, indent=2, default=str))
    write_csv(args.out / "results.csv", report)
    plot(args.out / "step_time.png", report)
    print(md)
    print(f"[step_cost] wrote {args.out}/results.{{md,csv,json}} and step_time.png", file=sys.stderr)
    return report


if __name__ == "__main__":
    main()
