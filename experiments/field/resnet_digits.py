"""Task ``resnet_digits``: a small residual convolutional net with batch norm on 8x8 digits.

scikit-learn's bundled digits (1 797 images, no download), 80 % train / 20 % held out
(split by the seed). Stem conv 3x3 → 16 channels, one residual block at 16 channels,
one strided block to 32 channels (1x1 projection shortcut), global average pooling,
linear head. Batch 64 drawn by reshuffling each epoch, 400 steps, no clipping (as usual
for convolutional nets). Held-out loss in eval mode (batch-norm running statistics).
Loss: cross-entropy in nats.
"""

from __future__ import annotations

from typing import Any

import torch
import torch.nn.functional as F
from torch import Tensor, nn

from .recorder import MakeOptimizer, Recorder

BATCH = 64
STEPS = 400


class ResBlock(nn.Module):
    """conv-bn-relu-conv-bn plus shortcut, then relu."""

    def __init__(self, cin: int, cout: int, stride: int) -> None:
        super().__init__()
        self.conv1 = nn.Conv2d(cin, cout, 3, stride, 1, bias=False)
        self.bn1 = nn.BatchNorm2d(cout)
        self.conv2 = nn.Conv2d(cout, cout, 3, 1, 1, bias=False)
        self.bn2 = nn.BatchNorm2d(cout)
        self.short: nn.Module = nn.Identity()
        if stride != 1 or cin != cout:
            self.short = nn.Sequential(nn.Conv2d(cin, cout, 1, stride, bias=False), nn.BatchNorm2d(cout))

    def forward(self, x: Tensor) -> Tensor:
        out = F.relu(self.bn1(self.conv1(x)))
        return F.relu(self.bn2(self.conv2(out)) + self.short(x))


def make_model() -> nn.Module:
    """The residual net (about 20 000 parameters)."""
    return nn.Sequential(
        nn.Conv2d(1, 16, 3, 1, 1, bias=False),
        nn.BatchNorm2d(16),
        nn.ReLU(),
        ResBlock(16, 16, 1),
        ResBlock(16, 32, 2),
        nn.AdaptiveAvgPool2d(1),
        nn.Flatten(),
        nn.Linear(32, 10),
    )


def _data(seed: int) -> tuple[Tensor, Tensor, Tensor, Tensor]:
    from sklearn.datasets import load_digits

    d = load_digits()
    x = torch.tensor(d.images, dtype=torch.float32).unsqueeze(1) / 16.0
    y = torch.tensor(d.target, dtype=torch.int64)
    perm = torch.randperm(x.shape[0], generator=torch.Generator().manual_seed(seed))
    cut = int(0.8 * x.shape[0])
    tr, te = perm[:cut], perm[cut:]
    mean, std = x[tr].mean(), x[tr].std()
    x = (x - mean) / std
    return x[tr], y[tr], x[te], y[te]


def run(seed: int, make_optimizer: MakeOptimizer, steps: int | None = None) -> dict[str, Any]:
    """Train with the optimizer (and scheduler) from ``make_optimizer(params, steps)``."""
    steps = steps or STEPS
    xtr, ytr, xte, yte = _data(seed)
    torch.manual_seed(seed)
    model = make_model()
    opt, sched = make_optimizer(model.parameters(), steps)
    gen = torch.Generator().manual_seed(seed)
    rec = Recorder()
    order, pos = torch.randperm(xtr.shape[0], generator=gen), 0
    for step in range(steps):
        if pos + BATCH > order.numel():
            order, pos = torch.randperm(xtr.shape[0], generator=gen), 0
        idx = order[pos : pos + BATCH]
        pos += BATCH
        opt.zero_grad(set_to_none=True)
        loss = F.cross_entropy(model(xtr[idx]), ytr[idx])
        loss.backward()
        opt.step()
        if sched is not None:
            sched.step()
        if not rec.after_step(step, loss.item(), opt):
            break
    result = rec.summary(opt)
    if not rec.diverged:
        model.eval()
        with torch.no_grad():
            result["held_out_loss"] = float(F.cross_entropy(model(xte), yte))
    else:
        result["held_out_loss"] = None
    return result
