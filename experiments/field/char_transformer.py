"""Task ``char_transformer``: a small causal transformer language model on bytes.

2 pre-norm blocks, width 64, 4 heads, MLP 4x, learned positions, context 64, tied output
layer, on the UTF-8 bytes of :mod:`experiments.field.corpus` (the last 10 % held out).
Each step draws 16 random windows (seeded), clips the gradient norm to 1.0 and steps.
Weight decay 0.1 on matrices only (embeddings, biases and norms in a second group without
decay), as small-GPT training scripts do. Loss: nats per byte.
"""

from __future__ import annotations

from typing import Any

import torch
import torch.nn.functional as F
from torch import Tensor, nn

from .corpus import byte_ids
from .recorder import MakeOptimizer, Recorder

WIDTH = 64
HEADS = 4
LAYERS = 2
CONTEXT = 64
BATCH = 16
CLIP = 1.0
WEIGHT_DECAY = 0.1
STEPS = 1000
HELD_OUT_FRACTION = 0.1
EVAL_WINDOWS = 256
VOCAB = 256


class Block(nn.Module):
    """Pre-norm causal self-attention and MLP, each with a residual connection."""

    def __init__(self) -> None:
        super().__init__()
        self.norm1, self.norm2 = nn.LayerNorm(WIDTH), nn.LayerNorm(WIDTH)
        self.qkv, self.proj = nn.Linear(WIDTH, 3 * WIDTH), nn.Linear(WIDTH, WIDTH)
        self.mlp = nn.Sequential(nn.Linear(WIDTH, 4 * WIDTH), nn.GELU(), nn.Linear(4 * WIDTH, WIDTH))

    def forward(self, x: Tensor) -> Tensor:
        b, t, d = x.shape
        q, k, v = (z.view(b, t, HEADS, d // HEADS).transpose(1, 2) for z in self.qkv(self.norm1(x)).split(d, 2))
        att = F.scaled_dot_product_attention(q, k, v, is_causal=True).transpose(1, 2).reshape(b, t, d)
        x = x + self.proj(att)
        return x + self.mlp(self.norm2(x))


class TinyGPT(nn.Module):
    """Byte embedding + positions → blocks → final norm → output tied to the embedding."""

    def __init__(self) -> None:
        super().__init__()
        self.tok = nn.Embedding(VOCAB, WIDTH)
        self.pos = nn.Parameter(torch.zeros(CONTEXT, WIDTH))
        self.blocks = nn.Sequential(*(Block() for _ in range(LAYERS)))
        self.norm = nn.LayerNorm(WIDTH)
        for m in self.modules():
            if isinstance(m, nn.Linear | nn.Embedding):
                nn.init.normal_(m.weight, std=0.02)
            if isinstance(m, nn.Linear) and m.bias is not None:
                nn.init.zeros_(m.bias)

    def forward(self, x: Tensor) -> Tensor:
        h = self.blocks(self.tok(x) + self.pos[: x.shape[1]])
        return self.norm(h) @ self.tok.weight.t()


def param_groups(model: nn.Module) -> list[dict[str, Any]]:
    """Matrices of the linear layers decay; embeddings, positions, biases and norms do not."""
    decay = [p for n, p in model.named_parameters() if p.dim() == 2 and n.startswith("blocks")]
    rest = [p for n, p in model.named_parameters() if not (p.dim() == 2 and n.startswith("blocks"))]
    return [{"params": decay, "weight_decay": WEIGHT_DECAY}, {"params": rest, "weight_decay": 0.0}]


def _split() -> tuple[Tensor, Tensor]:
    ids = byte_ids()
    cut = int(ids.numel() * (1 - HELD_OUT_FRACTION))
    return ids[:cut], ids[cut:]


def _windows(data: Tensor, n: int, gen: torch.Generator) -> tuple[Tensor, Tensor]:
    start = torch.randint(data.numel() - CONTEXT - 1, (n,), generator=gen)
    idx = start[:, None] + torch.arange(CONTEXT + 1)
    chunk = data[idx]
    return chunk[:, :-1], chunk[:, 1:]


def _loss(model: nn.Module, x: Tensor, y: Tensor) -> Tensor:
    return F.cross_entropy(model(x).reshape(-1, VOCAB), y.reshape(-1))


@torch.no_grad()
def evaluate(model: nn.Module, held: Tensor) -> float:
    """Mean nats per byte over ``EVAL_WINDOWS`` fixed windows of the held-out bytes."""
    model.eval()
    x, y = _windows(held, EVAL_WINDOWS, torch.Generator().manual_seed(1234))
    loss = sum(float(_loss(model, x[i : i + 64], y[i : i + 64])) for i in range(0, EVAL_WINDOWS, 64))
    model.train()
    return loss / (EVAL_WINDOWS // 64)


def run(seed: int, make_optimizer: MakeOptimizer, steps: int | None = None) -> dict[str, Any]:
    """Train with the optimizer (and scheduler) from ``make_optimizer(param_groups, steps)``."""
    steps = steps or STEPS
    train, held = _split()
    torch.manual_seed(seed)
    model = TinyGPT()
    opt, sched = make_optimizer(param_groups(model), steps)
    gen = torch.Generator().manual_seed(seed)
    rec = Recorder()
    for step in range(steps):
        x, y = _windows(train, BATCH, gen)
        opt.zero_grad(set_to_none=True)
        loss = _loss(model, x, y)
        loss.backward()
        torch.nn.utils.clip_grad_norm_(model.parameters(), CLIP)
        opt.step()
        if sched is not None:
            sched.step()
        if not rec.after_step(step, loss.item(), opt):
            break
    result = rec.summary(opt)
    result["held_out_loss"] = None if rec.diverged else evaluate(model, held)
    return result
