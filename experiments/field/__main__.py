"""``python -m experiments.field``: see :mod:`experiments.field`."""

from .cli import main

main()
