"""Offline text for the field benchmark: prose that ships with Python itself.

The corpus is the text of ``pydoc_data.topics`` (the interpreter's help pages) followed by
the docstrings and comments of every standard-library source file (test suites and
``site-packages`` excluded), in sorted path order. Nothing is downloaded; the corpus is
deterministic for a given Python installation (:func:`corpus_digest` identifies it). The
first build parses ~1 000 files (about 20 s) and caches the text under the output folder.
"""

from __future__ import annotations

import ast
import hashlib
import io
import re
import sysconfig
import tokenize
from collections import Counter
from collections.abc import Iterator
from functools import lru_cache
from pathlib import Path

import torch
from torch import Tensor

__all__ = ["EOS", "UNK", "byte_ids", "corpus_digest", "corpus_text", "word_ids"]

UNK = "<unk>"
EOS = "<eos>"
_SKIP_PARTS = {"test", "tests", "idle_test", "site-packages", "__pycache__", "lib2to3", "encodings"}
_WORD = re.compile(r"[a-z]+|[0-9]|[^\sa-z0-9]")
CACHE_DIR = Path("experiments/out/field/cache")


def _help_topics() -> Iterator[str]:
    from pydoc_data.topics import topics

    for name in sorted(topics):
        yield topics[name]


def _docstrings_and_comments(source: str) -> Iterator[str]:
    """Every docstring (module, class, function) and every comment of one source file."""
    try:
        tree = ast.parse(source)
    except (SyntaxError, ValueError):
        return
    for node in ast.walk(tree):
        if isinstance(node, ast.Module | ast.ClassDef | ast.FunctionDef | ast.AsyncFunctionDef):
            doc = ast.get_docstring(node)
            if doc:
                yield doc
    try:
        for tok in tokenize.generate_tokens(io.StringIO(source).readline):
            if tok.type == tokenize.COMMENT:
                yield tok.string.lstrip("#").strip()
    except (tokenize.TokenError, SyntaxError):
        return


def _stdlib_files() -> list[Path]:
    root = Path(sysconfig.get_paths()["stdlib"])
    return sorted(p for p in root.rglob("*.py") if not _SKIP_PARTS & set(p.relative_to(root).parts))


def _build_text() -> str:
    parts = list(_help_topics())
    for path in _stdlib_files():
        try:
            source = path.read_text(encoding="utf-8")
        except (UnicodeDecodeError, OSError):
            continue
        parts.extend(s for s in _docstrings_and_comments(source) if s)
    return "\n".join(parts)


@lru_cache(maxsize=1)
def corpus_text() -> str:
    """The whole corpus as one string (cached on disk per Python version)."""
    import sys

    cache = CACHE_DIR / f"corpus-py{sys.version_info.major}{sys.version_info.minor}.txt"
    if cache.exists():
        return cache.read_text(encoding="utf-8")
    text = _build_text()
    cache.parent.mkdir(parents=True, exist_ok=True)
    cache.write_text(text, encoding="utf-8")
    return text


def corpus_digest() -> str:
    """A short SHA-256 of the corpus text, to tell runs on different corpora apart."""
    return hashlib.sha256(corpus_text().encode("utf-8")).hexdigest()[:12]


@lru_cache(maxsize=4)
def word_ids(vocab_size: int) -> tuple[Tensor, list[str]]:
    """The corpus as word ids: lowercased words, single digits and single punctuation marks.

    Each line ends with ``<eos>``. The ``vocab_size`` most frequent tokens are kept (ties
    broken alphabetically); every other token becomes ``<unk>``, so the vocabulary has
    ``vocab_size + 2`` entries. Returns ``(ids, itos)``.
    """
    lines = [_WORD.findall(line.lower()) for line in corpus_text().splitlines()]
    lines = [w for w in lines if w]
    counts = Counter(w for line in lines for w in line)
    ranked = sorted(counts.items(), key=lambda kv: (-kv[1], kv[0]))[:vocab_size]
    itos = [UNK, EOS] + [w for w, _ in ranked]
    stoi = {w: i for i, w in enumerate(itos)}
    ids = [stoi.get(w, 0) for line in lines for w in [*line, EOS]]
    return torch.tensor(ids, dtype=torch.int64), itos


@lru_cache(maxsize=1)
def byte_ids() -> Tensor:
    """The corpus as UTF-8 bytes (vocabulary of 256)."""
    return torch.frombuffer(bytearray(corpus_text().encode("utf-8")), dtype=torch.uint8).to(torch.int64)
