"""Diagnosis: the sign of the trail hypergradient at a field task's rate, per tensor family.

The tower learns ``log a_0`` from ``<g_s, D_{s-1}>``, the new gradient against the decaying sum
of recent updates ``D = Σ_j γ^(s-1-j) Δ_j`` (positive: grow, negative: shrink). This script
runs one field-benchmark point (any method: a fixed rate, warm-up + cosine, or the tower)
and records that product at every step with its own trail of the updates actually made, split
by tensor family (embedding-like tables, other matrices, vectors) and, for decoupled weight
decay, the share of the decay part ``a λ w``. It answers: at the best fixed rate, does the
greedy signal already ask to shrink (a short-horizon preference), and which tensors say so?

Usage::

    .venv/bin/python experiments/trail_probe.py char_transformer adamw fixed 3e-3
    .venv/bin/python experiments/trail_probe.py word_lstm adam tower 1e-3 --horizon 0.99

Prints the run's summary, then per tenth of the run the mean product and the fraction of
steps asking to grow, overall and per family. Measured results: experiments/README.md.
"""

from __future__ import annotations

import argparse
import importlib
import json
from collections.abc import Callable
from typing import Any

import torch
from torch import Tensor

from experiments.field import methods


def family(p: Tensor) -> str:
    """A coarse tensor family: tables with many rows, other matrices, vectors."""
    if p.dim() >= 2 and p.shape[0] > 200:
        return "table"
    return "matrix" if p.dim() >= 2 else "vector"


class TrailRecorder:
    """Keeps ``E <- γ E + (1 - γ) Δ`` of the updates made and records ``<g_s, E_{s-1}> / (1 - γ)``."""

    def __init__(self, opt: torch.optim.Optimizer, gamma: float) -> None:
        self.gamma = gamma
        self.groups = [(p, g["lr"], g.get("weight_decay", 0.0)) for g in opt.param_groups for p in g["params"]]
        self.trail = {p: torch.zeros_like(p) for p, _, _ in self.groups}
        self.decay_trail = {p: torch.zeros_like(p) for p, _, _ in self.groups}
        self.rows: list[dict[str, float]] = []
        self.before: dict[Tensor, Tensor] = {}

    def before_step(self, decoupled: bool) -> None:
        row: dict[str, float] = {}
        scale = 1.0 / (1.0 - self.gamma)
        for p, _, wd in self.groups:
            if p.grad is None:
                continue
            g = p.grad.flatten()
            row[family(p)] = row.get(family(p), 0.0) + float(torch.dot(g, self.trail[p].flatten())) * scale
            if decoupled and wd:
                row["decay part"] = (
                    row.get("decay part", 0.0) + float(torch.dot(g, self.decay_trail[p].flatten())) * scale
                )
        self.rows.append(row)
        self.before = {p: p.detach().clone() for p, _, _ in self.groups}

    def after_step(self, decoupled: bool) -> None:
        w = 1.0 - self.gamma
        for p, lr, wd in self.groups:
            self.trail[p].mul_(self.gamma).add_(self.before[p] - p.detach(), alpha=w)
            if decoupled and wd:
                self.decay_trail[p].mul_(self.gamma).add_(self.before[p], alpha=w * lr * wd)


def recording(inner: Callable[..., Any], gamma: float, decoupled: bool, out: list[TrailRecorder]) -> Callable[..., Any]:
    """Wrap a field ``MakeOptimizer`` so that every ``step`` is recorded."""

    def make(model: Any, steps: int) -> Any:
        opt, sched = inner(model, steps)
        rec = TrailRecorder(opt, gamma)
        out.append(rec)
        step = opt.step

        def recorded_step(*args: Any, **kwargs: Any) -> Any:
            rec.before_step(decoupled)
            result = step(*args, **kwargs)
            rec.after_step(decoupled)
            return result

        opt.step = recorded_step  # type: ignore[method-assign]
        return opt, sched

    return make


def _share(values: list[float]) -> str:
    """Mean and the fraction of steps asking to grow."""
    grow = sum(v > 0 for v in values) / len(values)
    return f"{sum(values) / len(values):.3g} ({grow:.0%} grow)"


def summarize(rows: list[dict[str, float]], parts: int = 10) -> list[str]:
    """Per tenth of the run: the total product and each family's, as mean and share asking to grow."""
    lines = []
    size = max(1, len(rows) // parts)
    for lo in range(0, len(rows), size):
        chunk = rows[lo : lo + size]
        totals = [sum(v for k, v in r.items() if k != "decay part") for r in chunk]
        fams = sorted({k for r in chunk for k in r})
        per = {f: _share([r.get(f, 0.0) for r in chunk]) for f in fams}
        lines.append(f"steps {lo}-{lo + len(chunk) - 1}: total {_share(totals)} {per}")
    return lines


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("task", choices=["word_lstm", "char_transformer", "resnet_digits", "lsq_raw"])
    parser.add_argument("base", choices=["adam", "adamw", "sgd"])
    parser.add_argument("method", choices=["fixed", "cosine", "tower", "tower_cosine"])
    parser.add_argument("lr", type=float)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--horizon", type=float, default=0.99, help="γ of the recorded trail (default: 0.99)")
    args = parser.parse_args()
    torch.set_num_threads(1)
    task = importlib.import_module(f"experiments.field.{args.task}")
    recorders: list[TrailRecorder] = []
    inner = methods.optimizer_factory(args.task, args.base, args.method, args.lr)
    result = task.run(args.seed, recording(inner, args.horizon, args.base == "adamw", recorders))
    print(json.dumps({k: v for k, v in result.items() if not isinstance(v, (list, dict))}))
    print("\n".join(summarize(recorders[0].rows)))


if __name__ == "__main__":
    main()
