"""Task ``lsq_raw``: linear least squares on raw, badly scaled features.

The data is the sensitivity benchmark's ``lsq_raw`` set, re-created here with the same
constants and data seed (``stepsize_tower/tasks/tabular.py``): 2 048 rows, 12 columns
``scale_j · (offset_j + z_j)`` with scales log-spaced from 1e-2 to 1e3, target
``Σ c_j z_j + 0.1 ε``. The best linear fit reaches about 0.01 (the noise variance), but only
after every column, tiny to huge, is fitted. 80 % / 20 % split by the seed, batch 64,
1 000 steps, no clipping. Loss: mean squared error.
"""

from __future__ import annotations

from functools import lru_cache
from typing import Any

import torch
import torch.nn.functional as F
from torch import Tensor, nn

from .recorder import MakeOptimizer, Recorder

SCALES = (1e-2, 1e3)
FEATURES = 12
ROWS = 2048
NOISE = 0.1
DATA_SEED = 20240611
BATCH = 64
STEPS = 1000


@lru_cache(maxsize=1)
def raw_data() -> tuple[Tensor, Tensor]:
    """The same generated measurements as ``stepsize_tower.tasks.tabular._raw_data``."""
    gen = torch.Generator().manual_seed(DATA_SEED)
    lo, hi = (torch.tensor(s).log10() for s in SCALES)
    scales = torch.logspace(float(lo), float(hi), FEATURES)
    offsets = torch.rand(FEATURES, generator=gen)
    z = torch.randn(ROWS, FEATURES, generator=gen)
    coef = torch.randn(FEATURES, generator=gen)
    coef = coef / coef.norm()
    y = z @ coef + NOISE * torch.randn(ROWS, generator=gen)
    return scales * (offsets + z), y


def run(seed: int, make_optimizer: MakeOptimizer, steps: int | None = None) -> dict[str, Any]:
    """Train with the optimizer (and scheduler) from ``make_optimizer(params, steps)``."""
    steps = steps or STEPS
    x, y = raw_data()
    perm = torch.randperm(ROWS, generator=torch.Generator().manual_seed(seed))
    cut = int(0.8 * ROWS)
    tr, te = perm[:cut], perm[cut:]
    torch.manual_seed(seed)
    model = nn.Linear(FEATURES, 1)
    opt, sched = make_optimizer(model.parameters(), steps)
    gen = torch.Generator().manual_seed(seed)
    rec = Recorder()
    for step in range(steps):
        idx = tr[torch.randint(tr.numel(), (BATCH,), generator=gen)]
        opt.zero_grad(set_to_none=True)
        loss = F.mse_loss(model(x[idx]).squeeze(-1), y[idx])
        loss.backward()
        opt.step()
        if sched is not None:
            sched.step()
        if not rec.after_step(step, loss.item(), opt):
            break
    result = rec.summary(opt)
    with torch.no_grad():
        held = float(F.mse_loss(model(x[te]).squeeze(-1), y[te]))
    result["held_out_loss"] = held if not rec.diverged and held == held else None
    return result
