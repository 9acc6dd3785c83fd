"""Step cost and host reads on an accelerator (CUDA); skipped where none is present.

What it measures, on the first CUDA device, for float32 parameters split like a model:
    * the median ``optimizer.step()`` time of torch ``Adam(fused=True)``, torch
      ``Adam(foreach=True)``, ``TowerAdam`` and ``TowerSGD(momentum=0.9)``, round-robin
      after a warm-up of 30 steps (past the tower's start-up window), each step followed
      by ``torch.cuda.synchronize()``;
    * the device-to-host reads of the tower's settled steps (steps 31-60), counted under a
      ``TorchDispatchMode`` (``aten::_local_scalar_dense``); the target is 0;
    * whether a settled ``TowerAdam`` step can be captured in a CUDA graph
      (``torch.cuda.graph``), and whether its replay matches an eager step. Anything the
      capture refuses is printed, not hidden.

How to run
    .venv/bin/python experiments/accelerator_step.py [--params 1e7] [--repeats 50]

It prints a small table and exits 0 without a GPU ("no CUDA device: skipped"). Nothing
else in the project depends on it. Results so far: none recorded (no GPU was lent to the
session that wrote it; see experiments/README.md).
"""

from __future__ import annotations

import argparse
import statistics
import time
from collections.abc import Callable
from typing import Any

import torch
from torch.utils._python_dispatch import TorchDispatchMode

from stepsize_tower import TowerAdam, TowerSGD

Factory = Callable[[list[torch.Tensor]], torch.optim.Optimizer]

FACTORIES: dict[str, Factory] = {
    "torch Adam fused": lambda p: torch.optim.Adam(p, lr=1e-3, fused=True),
    "torch Adam foreach": lambda p: torch.optim.Adam(p, lr=1e-3, foreach=True),
    "TowerAdam": lambda p: TowerAdam(p, lr=1e-3),
    "TowerSGD momentum": lambda p: TowerSGD(p, lr=1e-2, momentum=0.9),
}


class _Reads(TorchDispatchMode):
    def __init__(self) -> None:
        super().__init__()
        self.count = 0

    def __torch_dispatch__(self, func: Any, types: Any, args: Any = (), kwargs: Any = None) -> Any:
        if func is torch.ops.aten._local_scalar_dense.default:
            self.count += 1
        return func(*args, **(kwargs or {}))


def _params(total: float, device: torch.device) -> list[torch.Tensor]:
    """Square weight matrices of width 1024 plus biases, about ``total`` entries."""
    width = 1024
    layers = max(1, round(total / (width * width + width)))
    gen = torch.Generator(device="cpu").manual_seed(0)
    out = []
    for _ in range(layers):
        for shape in ((width, width), (width,)):
            p = (0.02 * torch.randn(shape, generator=gen)).to(device).requires_grad_()
            p.grad = 1e-3 * torch.randn(shape, generator=gen).to(device)
            out.append(p)
    return out


def _timed(opts: dict[str, torch.optim.Optimizer], repeats: int) -> dict[str, float]:
    times: dict[str, list[float]] = {name: [] for name in opts}
    for _ in range(repeats):
        for name, opt in opts.items():
            torch.cuda.synchronize()
            start = time.perf_counter()
            opt.step()
            torch.cuda.synchronize()
            times[name].append(time.perf_counter() - start)
    return {name: statistics.median(t) * 1e3 for name, t in times.items()}


def _graph_capture(params: list[torch.Tensor]) -> str:
    """Capture one settled TowerAdam step in a CUDA graph and compare its replay with eager."""
    eager_params = [p.detach().clone().requires_grad_() for p in params]
    graph_params = [p.detach().clone().requires_grad_() for p in params]
    for a, b, p in zip(eager_params, graph_params, params, strict=True):
        a.grad, b.grad = p.grad.clone(), p.grad.clone()
    eager, captured = TowerAdam(eager_params, lr=1e-3), TowerAdam(graph_params, lr=1e-3)
    for _ in range(30):
        eager.step()
        captured.step()
    stream = torch.cuda.Stream()
    stream.wait_stream(torch.cuda.current_stream())
    with torch.cuda.stream(stream):
        captured.step()  # one more warm step on the side stream, as torch's docs advise
    torch.cuda.current_stream().wait_stream(stream)
    eager.step()
    graph = torch.cuda.CUDAGraph()
    try:
        with torch.cuda.graph(graph):
            captured.step()
    except Exception as err:  # report what the capture refused
        return f"capture failed: {type(err).__name__}: {str(err).splitlines()[0]}"
    graph.replay()
    eager.step()
    worst = max(float((a - b).abs().max()) for a, b in zip(eager_params, graph_params, strict=True))
    return f"captured; replay vs eager: max |difference| = {worst:.3g}"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--params", type=float, default=1e7, help="parameter count (default 1e7)")
    parser.add_argument("--repeats", type=int, default=50, help="timed rounds (default 50)")
    args = parser.parse_args()
    if not torch.cuda.is_available():
        print("no CUDA device: skipped")
        return
    device = torch.device("cuda")
    base = _params(args.params, device)
    opts = {}
    for name, make in FACTORIES.items():
        own = [p.detach().clone().requires_grad_() for p in base]
        for q, p in zip(own, base, strict=True):
            q.grad = p.grad.clone()
        opts[name] = make(own)
        for _ in range(30):
            opts[name].step()
    medians = _timed(opts, args.repeats)
    print(f"{torch.cuda.get_device_name()}, {sum(p.numel() for p in base):.3g} parameters, torch {torch.__version__}")
    print("| optimizer | median step (ms) | ÷ fused Adam | reads over 30 settled steps |")
    print("|---|---|---|---|")
    for name, opt in opts.items():
        reads = _Reads()
        with reads:
            for _ in range(30):
                opt.step()
        torch.cuda.synchronize()
        ratio = medians[name] / medians["torch Adam fused"]
        print(f"| {name} | {medians[name]:.3f} | {ratio:.2f} | {reads.count} |")
    print("CUDA graph of a settled TowerAdam step:", _graph_capture(base))


if __name__ == "__main__":
    main()
