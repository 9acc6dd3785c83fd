"""Task ``word_lstm``: a word-level LSTM language model, trained the classic way.

2-layer LSTM (64-d embeddings and hidden state), dropout 0.2, on the word-level corpus of
:mod:`experiments.field.corpus` (10 000 most frequent tokens + ``<unk>`` and ``<eos>``).
The output layer is PyTorch's adaptive softmax (``nn.AdaptiveLogSoftmaxWithLoss``, Grave et
al., ICML 2017): an exact, normalized distribution over all 10 002 tokens, factored into a
head (200 most frequent tokens + 2 cluster tokens, 64-d) and two tail clusters (16-d and
4-d). A full 10 002-way softmax costs 0.3 s per step on this machine's single shared thread,
the adaptive one 0.016 s; it is how large vocabularies are trained on small compute.
The token stream is cut into 20 columns; each step takes the next 35 rows (truncated
back-propagation through time, hidden state carried over and detached), clips the
gradient norm to 0.25 and steps. The last 10 % of the stream is held out.
Loss: nats per token.
"""

from __future__ import annotations

from typing import Any

import torch
from torch import Tensor, nn

from .corpus import word_ids
from .recorder import MakeOptimizer, Recorder

VOCAB_WORDS = 10_000
EMBED = 64
CUTOFFS = [200, 2000]
DIV_VALUE = 4.0
LAYERS = 2
DROPOUT = 0.2
BATCH = 20
BPTT = 35
CLIP = 0.25
STEPS = 1000
HELD_OUT_FRACTION = 0.1
EVAL_BATCHES = 40


class WordLSTM(nn.Module):
    """Embedding → 2-layer LSTM → adaptive softmax; ``forward`` returns the mean nats per token."""

    def __init__(self, vocab: int) -> None:
        super().__init__()
        self.drop = nn.Dropout(DROPOUT)
        self.encoder = nn.Embedding(vocab, EMBED)
        self.rnn = nn.LSTM(EMBED, EMBED, LAYERS, dropout=DROPOUT)
        self.decoder = nn.AdaptiveLogSoftmaxWithLoss(EMBED, vocab, CUTOFFS, div_value=DIV_VALUE)
        nn.init.uniform_(self.encoder.weight, -0.1, 0.1)

    def forward(self, x: Tensor, y: Tensor, hidden: tuple[Tensor, Tensor]) -> tuple[Tensor, tuple[Tensor, Tensor]]:
        out, hidden = self.rnn(self.drop(self.encoder(x)), hidden)
        return self.decoder(self.drop(out).reshape(-1, EMBED), y.reshape(-1)).loss, hidden

    def init_hidden(self, batch: int) -> tuple[Tensor, Tensor]:
        z = torch.zeros(LAYERS, batch, EMBED)
        return z, z.clone()


def _batchify(ids: Tensor, batch: int) -> Tensor:
    n = ids.numel() // batch
    return ids[: n * batch].view(batch, n).t().contiguous()


def _data(seed: int) -> tuple[Tensor, Tensor, int]:
    ids, itos = word_ids(VOCAB_WORDS)
    cut = int(ids.numel() * (1 - HELD_OUT_FRACTION))
    train, held = ids[:cut], ids[cut:]
    shift = int(torch.randint(cut, (1,), generator=torch.Generator().manual_seed(seed)))
    train = torch.cat([train[shift:], train[:shift]])  # the seed picks where the stream starts
    return _batchify(train, BATCH), _batchify(held, BATCH), len(itos)


@torch.no_grad()
def evaluate(model: WordLSTM, data: Tensor) -> float:
    """Mean nats per token over the first ``EVAL_BATCHES`` windows of the held-out stream."""
    model.eval()
    hidden = model.init_hidden(data.shape[1])
    total, count = 0.0, 0
    for i in range(0, min(data.shape[0] - 1, EVAL_BATCHES * BPTT), BPTT):
        x, y = data[i : i + BPTT], data[i + 1 : i + 1 + BPTT]
        x = x[: y.shape[0]]
        loss, hidden = model(x, y, hidden)
        total += float(loss) * y.numel()
        count += y.numel()
    model.train()
    return total / count


def run(seed: int, make_optimizer: MakeOptimizer, steps: int | None = None) -> dict[str, Any]:
    """Train with the optimizer (and scheduler) from ``make_optimizer(params, steps)``."""
    steps = steps or STEPS
    train, held, vocab = _data(seed)
    torch.manual_seed(seed)
    model = WordLSTM(vocab)
    opt, sched = make_optimizer(model.parameters(), steps)
    rec = Recorder()
    hidden = model.init_hidden(BATCH)
    pos = 0
    for step in range(steps):
        if pos + BPTT + 1 > train.shape[0]:
            pos, hidden = 0, model.init_hidden(BATCH)
        x, y = train[pos : pos + BPTT], train[pos + 1 : pos + 1 + BPTT]
        pos += BPTT
        hidden = (hidden[0].detach(), hidden[1].detach())
        opt.zero_grad()
        loss, hidden = model(x, y, hidden)
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
