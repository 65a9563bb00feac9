"""The ``orthoccp`` command's entry point, outside the ``orthoccp`` package.

Importing anything inside ``orthoccp`` first runs the package's ``__init__``, which loads
NumPy, pandas, SciPy and scikit-learn (about a second). A Ctrl-C in that second would end in
a ``KeyboardInterrupt`` traceback. This module imports nothing heavy itself, so it can catch
the interrupt during those imports too and exit with code 130 and one line, like an interrupt
later in the run (:func:`orthoccp.cli.main`).
"""

from __future__ import annotations

import importlib
import sys
from collections.abc import Sequence

__all__ = ["main"]

INTERRUPTED = 130
"""Exit code after Ctrl-C (128 + SIGINT), as the shells report it."""


def main(argv: Sequence[str] | None = None) -> int:
    """Import :mod:`orthoccp.cli` and return its ``main(argv)``; 130 after Ctrl-C, at any point."""
    try:
        cli = importlib.import_module("orthoccp.cli")
        return int(cli.main(argv))
    except KeyboardInterrupt:
        print("orthoccp: interrupted", file=sys.stderr)
        return INTERRUPTED
