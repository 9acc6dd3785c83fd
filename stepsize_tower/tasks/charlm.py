"""A character-level language model on a corpus available offline: Python's own docstrings.

The corpus is the docstrings of a fixed list of standard-library modules (and of their
public classes and functions), in a fixed order, mapped onto printable ASCII. It is
deterministic for a given Python version (:func:`corpus_digest` identifies it) and needs
no download.
"""

from __future__ import annotations

import hashlib
import importlib
import inspect
import string
from collections.abc import Callable, Iterator
from functools import lru_cache

import torch
import torch.nn.functional as F
from torch import Tensor, nn

from .base import Batch, TaskInstance, seeded_module

__all__ = ["CORPUS_MODULES", "VOCAB", "CharGRU", "build_char_gru", "corpus_digest", "corpus_text"]

CORPUS_MODULES = (
    "argparse",
    "bisect",
    "calendar",
    "collections",
    "contextlib",
    "copy",
    "csv",
    "dataclasses",
    "difflib",
    "enum",
    "fnmatch",
    "fractions",
    "functools",
    "heapq",
    "itertools",
    "json",
    "pathlib",
    "pprint",
    "queue",
    "random",
    "shutil",
    "statistics",
    "string",
    "textwrap",
    "zipfile",
)

#: Printable ASCII without the rarely used vertical tab and form feed; anything else maps to "?".
VOCAB = "".join(c for c in string.printable if c not in "\x0b\x0c")
_INDEX = {c: i for i, c in enumerate(VOCAB)}
_UNKNOWN = _INDEX["?"]

CORPUS_CHARS = 200_000
SEQ_LEN = 32
BATCH = 32
EVAL_WINDOWS = 512


def _docstrings(module_name: str) -> Iterator[str]:
    module = importlib.import_module(module_name)
    yield inspect.getdoc(module) or ""
    for name, obj in sorted(vars(module).items()):
        if name.startswith("_") or getattr(obj, "__module__", None) != module.__name__:
            continue
        if inspect.isclass(obj) or inspect.isfunction(obj):
            doc = inspect.getdoc(obj)
            if doc:
                yield doc


@lru_cache(maxsize=1)
def corpus_text() -> str:
    """The corpus: at most ``CORPUS_CHARS`` characters of docstrings, separated by blank lines."""
    text = "\n\n".join(doc for name in CORPUS_MODULES for doc in _docstrings(name) if doc)
    return text[:CORPUS_CHARS]


def corpus_digest() -> str:
    """A short SHA-256 digest of the corpus (it differs between Python versions)."""
    return hashlib.sha256(corpus_text().encode()).hexdigest()[:16]


@lru_cache(maxsize=1)
def _encoded() -> Tensor:
    return torch.tensor([_INDEX.get(c, _UNKNOWN) for c in corpus_text()], dtype=torch.int64)


class CharGRU(nn.Module):
    """Embedding, one GRU layer and a linear read-out to next-character logits."""

    def __init__(self, vocab: int, embed: int = 32, hidden: int = 128) -> None:
        super().__init__()
        self.embed = nn.Embedding(vocab, embed)
        self.rnn = nn.GRU(embed, hidden, batch_first=True)
        self.head = nn.Linear(hidden, vocab)

    def forward(self, tokens: Tensor) -> Tensor:
        out, _ = self.rnn(self.embed(tokens))
        return self.head(out)


def _loss(model: nn.Module, batch: Batch) -> Tensor:
    x, y = batch
    logits = model(x)
    return F.cross_entropy(logits.reshape(-1, logits.shape[-1]), y.reshape(-1))


def _windows(data: Tensor, starts: Tensor) -> Batch:
    offsets = torch.arange(SEQ_LEN + 1)
    chunk = data[starts.unsqueeze(1) + offsets]
    return chunk[:, :-1], chunk[:, 1:]


def _fixed_windows(data: Tensor, count: int) -> Batch:
    """``count`` evenly spaced windows covering ``data`` (the same for every seed)."""
    starts = torch.linspace(0, data.numel() - SEQ_LEN - 2, count).long()
    return _windows(data, starts)


def _evaluator(data: Tensor) -> Callable[[nn.Module], float]:
    x, y = _fixed_windows(data, EVAL_WINDOWS)

    def evaluate(model: nn.Module) -> float:
        was_training = model.training
        model.eval()
        with torch.no_grad():
            value = float(_loss(model, (x, y)))
        model.train(was_training)
        return value

    return evaluate


def build_char_gru(seed: int) -> TaskInstance:
    """Next-character prediction with a one-layer GRU (hidden 128) on the docstring corpus.

    The first 90 % of the corpus trains, the last 10 % is held out. Minibatches are 32
    windows of 32 characters at seeded random offsets; 300 steps. ``full_train_loss`` is
    the mean cross-entropy (nats per character) over 512 evenly spaced training windows.
    """
    data = _encoded()
    cut = int(data.numel() * 0.9)
    train, test = data[:cut], data[cut:]

    def batches() -> Iterator[Batch]:
        gen = torch.Generator().manual_seed(seed + 7919)
        while True:
            starts = torch.randint(0, train.numel() - SEQ_LEN - 1, (BATCH,), generator=gen)
            yield _windows(train, starts)

    model = seeded_module(seed, lambda: CharGRU(len(VOCAB)))
    return TaskInstance(
        name="char_gru",
        model=model,
        batches=batches,
        loss_fn=_loss,
        full_train_loss=_evaluator(train),
        test_loss=_evaluator(test),
        default_steps=300,
    )
