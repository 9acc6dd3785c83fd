"""The one error type of the recipe runner: a recipe that cannot be run, and where it went wrong."""

from __future__ import annotations

__all__ = ["RecipeError"]


class RecipeError(Exception):
    """A recipe (or a ``--set`` override) is malformed: the command exits with status 2.

    Attributes:
        source: the recipe file, or ``"--set"`` for an override.
        line: 1-based line in ``source`` when known.
        key: the dotted key path (``sweep.lr[2]``), empty for the whole file.
        message: what was wrong and what was expected.
    """

    def __init__(self, message: str, *, source: str = "", line: int | None = None, key: str = "") -> None:
        self.source = source
        self.line = line
        self.key = key
        self.message = message
        super().__init__(str(self))

    def __str__(self) -> str:
        where = self.source
        if where and self.line is not None:
            where += f":{self.line}"
        parts = [p for p in (where, self.key) if p]
        return ": ".join([*parts, self.message])
