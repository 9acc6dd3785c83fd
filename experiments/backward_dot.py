"""Does taking the trail's dot product inside backward make a training iteration cheaper?

What it measures
    The default ``TowerAdam`` step reads the gradient and the trail once for the hypergradient
    ``<g, E>`` before it updates anything. This experiment moves that read into backward:
    a post-accumulate-grad hook on every parameter takes ``<p.grad, E_p>`` as soon as the
    gradient is complete (while it may still be in cache), and the step uses the sum of those
    products instead of its own read pass. The hook records the gradient's version counter;
    when anything rewrote the gradient in place after the hook (clipping, unscaling, an
    all-reduce), or replaced it, the step falls back to its own pass, so the result never uses
    a stale gradient.

    Timed, round-robin in one process (as ``step_cost.py``), one whole iteration (forward +
    backward + step) of the same MLPs at batch 32: torch ``Adam(fused=True)``, the default
    ``TowerAdam``, and ``TowerAdam`` with the in-backward dot. Moved work is counted because
    the whole iteration is timed. Before timing, it checks that the in-backward variant gives
    the same weights as the default after a few steps (same products, same summation order:
    bitwise equal), and that a gradient clipped after backward is caught (fallback taken).

How to run
    .venv/bin/python experiments/backward_dot.py            # about a minute
    .venv/bin/python experiments/backward_dot.py --quick    # smoke test, seconds

    Prints a markdown table; ``--out`` (default ``experiments/out/backward_dot``) gets
    ``results.md`` and ``results.json``.
"""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

import torch
from torch import Tensor, nn

sys.path.insert(0, str(Path(__file__).resolve().parent))
from step_cost import ADAM_LR, SMALL_MLP, environment, mlp, round_robin, summarize

from stepsize_tower import TowerAdam

#: The ~10M-parameter MLP of the step-cost experiment's end-to-end row.
BIG_MLP = [1536, 2048, 2048, 1536, 10]


class BackwardDot:
    """Post-accumulate-grad hooks that take ``<p.grad, E_p>`` during backward for a TowerAdam.

    Patches the optimizer's rule so that its ``trail_dot`` returns the hooks' sum when every
    gradient is the one the hook saw (same tensor, same version), else None (the step's own
    pass runs). Counts both outcomes.
    """

    def __init__(self, opt: TowerAdam) -> None:
        self.opt = opt
        self.seen: dict[Tensor, tuple[Tensor, int, Tensor]] = {}
        self.used = self.fell_back = 0
        for group in opt.param_groups:
            for p in group["params"]:
                p.register_post_accumulate_grad_hook(self._hook)
        self._own = opt._rule.trail_dot
        opt._rule.trail_dot = self._trail_dot  # type: ignore[method-assign]

    def _hook(self, p: Tensor) -> None:
        trail = self.opt.state.get(p, {}).get("update_ema")
        if trail is not None and p.grad is not None:
            self.seen[p] = (p.grad, p.grad._version, torch.dot(p.grad.reshape(-1), trail.reshape(-1)))

    def _trail_dot(
        self, group: dict[str, Any], params: list[Tensor], grads: list[Tensor], trails: list[Tensor]
    ) -> Tensor | None:
        hooked = self._sum(params, grads)
        return hooked if hooked is not None else self._own(group, params, grads, trails)

    def _sum(self, params: list[Tensor], grads: list[Tensor]) -> Tensor | None:
        dots = []
        for p, g in zip(params, grads, strict=True):
            record = self.seen.pop(p, None)
            if record is None or record[0] is not g or record[1] != g._version:
                self.seen.clear()
                self.fell_back += 1
                return None
            dots.append(record[2])
        self.used += 1
        return torch.stack(dots).double().sum() if dots else None


def _batch(dims: list[int], batch: int, seed: int) -> tuple[Tensor, Tensor]:
    gen = torch.Generator().manual_seed(seed)
    return torch.randn(batch, dims[0], generator=gen), torch.randint(0, dims[-1], (batch,), generator=gen)


def check_equal(dims: list[int], steps: int = 15) -> dict[str, Any]:
    """Same weights with and without the hooks; a clipped gradient makes the step fall back."""
    torch.manual_seed(0)
    base = mlp(dims)
    x, y = _batch(dims, 32, 1)
    models = [mlp(dims) for _ in range(2)]
    for m in models:
        m.load_state_dict(base.state_dict())
    plain, hooked = (TowerAdam(m.parameters(), lr=ADAM_LR) for m in models)
    probe = BackwardDot(hooked)
    for _ in range(steps):
        for m, opt in zip(models, (plain, hooked), strict=True):
            opt.zero_grad(set_to_none=True)
            nn.functional.cross_entropy(m(x), y).backward()
            opt.step()
    same = all(torch.equal(a, b) for a, b in zip(models[0].parameters(), models[1].parameters(), strict=True))
    used_before = probe.used
    hooked.zero_grad(set_to_none=True)
    nn.functional.cross_entropy(models[1](x), y).backward()
    nn.utils.clip_grad_norm_(models[1].parameters(), 1e-3)  # rewrites every gradient in place
    hooked.step()
    return {"bitwise_equal": same, "used": used_before, "clip_fell_back": probe.used == used_before}


def bench(dims: list[int], batch: int, warmup: int, repeats: int) -> dict[str, Any]:
    torch.manual_seed(0)
    base = mlp(dims)
    x, y = _batch(dims, batch, 1)
    actions: dict[str, Callable[[], Any]] = {}
    probes: dict[str, BackwardDot] = {}
    for name in ("torch Adam fused", "TowerAdam (default)", "TowerAdam, dot in backward"):
        model = mlp(dims)
        model.load_state_dict(base.state_dict())
        if name == "torch Adam fused":
            opt: torch.optim.Optimizer = torch.optim.Adam(model.parameters(), lr=ADAM_LR, fused=True)
        else:
            opt = TowerAdam(model.parameters(), lr=ADAM_LR)
            if "backward" in name:
                probes[name] = BackwardDot(opt)

        def iteration(model: nn.Module = model, opt: torch.optim.Optimizer = opt) -> None:
            opt.zero_grad(set_to_none=True)
            nn.functional.cross_entropy(model(x), y).backward()
            opt.step()

        actions[name] = iteration
    samples = round_robin(actions, warmup, repeats)
    rows = {name: summarize(s) for name, s in samples.items()}
    for name, probe in probes.items():
        rows[name].update(used=probe.used, fell_back=probe.fell_back)
    return {"params": sum(p.numel() for p in base.parameters()), "dims": dims, "rows": rows}


def markdown(report: dict[str, Any]) -> str:
    lines = ["# The trail's dot product inside backward", ""]
    env = report["environment"]
    lines.append(f"torch {env['torch']}, {env['threads']} threads, CPU: {env['cpu_model']}.")
    for check in report["checks"]:
        lines.append(
            f"Check {check['dims']}: weights bitwise equal to the default after 15 steps: "
            f"{check['bitwise_equal']}; hook sums used {check['used']}×; clipped gradient → fallback: "
            f"{check['clip_fell_back']}."
        )
    for run in report["runs"]:
        ref = run["rows"]["torch Adam fused"]["median_ms"]
        lines += ["", f"## MLP {run['dims']}, {run['params'] / 1e6:.3g}M parameters, batch 32", ""]
        lines += ["| optimizer | median ms (IQR) | min ms | ratio to fused Adam |", "|---|---|---|---|"]
        for name, row in run["rows"].items():
            lines.append(
                f"| {name} | {row['median_ms']:.3g} ({row['iqr_ms']:.2g}) | {row['min_ms']:.3g} | "
                f"{row['median_ms'] / ref:.2f} |"
            )
    return "\n".join(lines) + "\n"


def main(argv: list[str] | None = None) -> dict[str, Any]:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--repeats", type=int, default=40)
    parser.add_argument("--threads", type=int, default=1)
    parser.add_argument("--out", type=Path, default=Path("experiments/out/backward_dot"))
    parser.add_argument("--quick", action="store_true", help="small model only, few repeats")
    args = parser.parse_args(argv)
    torch.set_num_threads(args.threads)
    sizes = [SMALL_MLP] if args.quick else [BIG_MLP, SMALL_MLP]
    repeats = 5 if args.quick else args.repeats
    report: dict[str, Any] = {"environment": environment(), "checks": [], "runs": []}
    for dims in sizes:
        report["checks"].append({"dims": dims, **check_equal(dims)})
        report["runs"].append(bench(dims, 32, warmup=20, repeats=repeats))
    text = markdown(report)
    print(text)
    args.out.mkdir(parents=True, exist_ok=True)
    (args.out / "results.md").write_text(text)
    (args.out / "results.json").write_text(json.dumps(report, indent=2))
    return report


if __name__ == "__main__":
    main()
