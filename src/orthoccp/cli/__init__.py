"""Command-line interface: ``orthoccp demo``, ``simulate``, ``estimate``, ``compare``, ``report``
and ``montecarlo``.

Exit codes: 0 on success; 2 on a usage or input error (bad option, missing file, bad spec,
bad data), reported as one line ``orthoccp: error: ...`` on stderr; 1 when the estimation
itself fails (:class:`~orthoccp.EstimationError`) or on an unexpected error. ``--debug``
adds the traceback.

The command line sets ``OMP_WAIT_POLICY=PASSIVE`` for its own process unless the variable is
already set (see :func:`main`).

Layout: ``_plumbing`` (parser classes, progress lines, warnings, output paths, JSON),
``_commands`` (one handler per command) and ``_parser`` (:func:`build_parser`, the help texts).
"""

from __future__ import annotations

import contextlib
import os
import sys
import traceback
from collections.abc import Sequence
from typing import Any

import pandas as pd

import orthoccp as oc

from ._parser import build_parser
from ._plumbing import (
    PROG,
    _error_message,
    _Handler,
    _one_line,
    _report,
    _UsageError,
    _warnings_to_stderr,
    results_payload,
)

__all__ = ["main", "results_payload"]


def _exit_code(code: Any) -> int:
    if code is None:
        return 0
    if isinstance(code, int):
        return code
    print(code, file=sys.stderr)
    return 1


def main(argv: Sequence[str] | None = None) -> int:
    """Run the ``orthoccp`` command line.

    Parameters
    ----------
    argv : sequence of str, optional
        Arguments without the program name; ``sys.argv[1:]`` when omitted.

    Returns
    -------
    int
        Exit code: 0 success, 2 usage or input error, 1 estimation failure or unexpected
        error, 130 after Ctrl-C (at any point; the ``orthoccp`` command also catches it
        while the package is still being imported, see :mod:`orthoccp_entry`).
    """
    try:
        return _main(argv)
    except KeyboardInterrupt:
        print(f"{PROG}: interrupted", file=sys.stderr)
        return 130


def _main(argv: Sequence[str] | None) -> int:
    args_list = list(sys.argv[1:] if argv is None else argv)
    parser = build_parser()
    try:
        args = parser.parse_args(args_list)
    except _UsageError as exc:
        print(f"{PROG}: error: {_one_line(str(exc))}", file=sys.stderr)
        return 2
    except SystemExit as exc:  # --help and --version
        return _exit_code(exc.code)
    args.command_line = [PROG, *args_list]  # the provenance a report records
    debug = bool(getattr(args, "debug", False))
    # LightGBM's OpenMP threads spin while they wait by default; on a busy machine (other
    # processes on the same cores) that slows the first stage by an order of magnitude.
    # Passive waiting costs nothing measurable on an idle machine. The runtime reads this
    # when LightGBM is first loaded, which happens at the first fit; a user's setting wins.
    os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")
    handler: _Handler | None = getattr(args, "handler", None)
    if handler is None:
        print(
            f"{PROG}: error: choose a command: demo, simulate, estimate, sensitivity, compare, "
            f"report or montecarlo "
            f"(see '{PROG} --help')",
            file=sys.stderr,
        )
        return 2
    try:
        with _warnings_to_stderr(debug=debug):
            return handler(args)
    except oc.EstimationError as exc:
        _report(exc, debug=debug, prefix="estimation failed")
        return 1
    except (oc.InputError, FileNotFoundError, ValueError, pd.errors.ParserError) as exc:
        _report(exc, debug=debug)
        return 2
    except BrokenPipeError:
        # The reader of stdout went away (e.g. '| head'); stop quietly.
        with contextlib.suppress(OSError):
            devnull = os.open(os.devnull, os.O_WRONLY)
            os.dup2(devnull, sys.stdout.fileno())
        return 1
    except OSError as exc:
        _report(exc, debug=debug)
        return 2
    except KeyboardInterrupt:
        print(f"{PROG}: interrupted", file=sys.stderr)
        return 130
    except Exception as exc:  # noqa: BLE001 - last resort, keeps the one-line contract
        if debug:
            traceback.print_exception(type(exc), exc, exc.__traceback__, file=sys.stderr)
        print(
            f"{PROG}: internal error: {type(exc).__name__}: {_error_message(exc)} "
            f"(rerun with --debug for the traceback)",
            file=sys.stderr,
        )
        return 1
