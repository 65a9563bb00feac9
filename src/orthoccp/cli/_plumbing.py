"""Command-line plumbing: the parser classes, progress lines, warnings, output paths, JSON."""

from __future__ import annotations

import argparse
import contextlib
import json
import math
import sys
import time
import traceback
import warnings
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any, NoReturn, TextIO

import numpy as np

import orthoccp as oc

from .._outputs import writing
from ..results import param_records

PROG = "orthoccp"
DEMO_SCENARIO = "ebike"
DEMO_FOLDER = "orthoccp-demo"

_Handler = Callable[[argparse.Namespace], int]


# --------------------------------------------------------------------------- plumbing
class _UsageError(Exception):
    """A command-line usage error (raised instead of argparse's print-and-exit)."""


class _Parser(argparse.ArgumentParser):
    """An argument parser whose errors become one-line messages handled by :func:`main`."""

    def error(self, message: str) -> NoReturn:
        raise _UsageError(f"{message} (see '{self.prog} --help')")


class _Formatter(argparse.RawDescriptionHelpFormatter):
    """Keeps the hand-formatted examples in the epilogs and shows defaults."""

    def __init__(self, prog: str) -> None:
        super().__init__(prog, max_help_position=32)


def _one_line(text: str) -> str:
    return " ".join(str(text).split())


def _error_message(exc: BaseException) -> str:
    if isinstance(exc, OSError) and exc.filename is not None and exc.strerror:
        return f"{exc.strerror}: {str(exc.filename)!r}"
    text = _one_line(str(exc))
    return text or type(exc).__name__


def _report(exc: BaseException, *, debug: bool, prefix: str = "error") -> None:
    if debug:
        traceback.print_exception(type(exc), exc, exc.__traceback__, file=sys.stderr)
    print(f"{PROG}: {prefix}: {_error_message(exc)}", file=sys.stderr)


class _Progress:
    """Stage names on stderr, only when stderr is a terminal.

    Parameters
    ----------
    stream : text stream, optional
        Where to write; ``sys.stderr`` when omitted.
    enabled : bool, optional
        Force on or off; by default on exactly when ``stream`` is a terminal.
    """

    def __init__(self, *, stream: TextIO | None = None, enabled: bool | None = None) -> None:
        self.stream = stream if stream is not None else sys.stderr
        if enabled is None:
            isatty = getattr(self.stream, "isatty", None)
            enabled = bool(isatty()) if callable(isatty) else False
        self.enabled = enabled
        self.start = time.perf_counter()

    @property
    def elapsed(self) -> float:
        """Seconds since the progress reporter was created."""
        return time.perf_counter() - self.start

    def stage(self, name: str) -> None:
        """Announce a stage."""
        if self.enabled and self.stream is not None:
            print(f"{PROG}: [{self.elapsed:6.1f}s] {name}", file=self.stream, flush=True)


@contextlib.contextmanager
def _warnings_to_stderr(*, debug: bool) -> Iterator[None]:
    """Show orthoccp's warnings as one line each (once); others only with ``--debug``."""
    seen: set[tuple[type[Warning], str]] = set()

    def show(
        message: Warning | str,
        category: type[Warning],
        filename: str,
        lineno: int,
        file: TextIO | None = None,
        line: str | None = None,
    ) -> None:
        text = _one_line(str(message))
        if (category, text) in seen:
            return
        seen.add((category, text))
        if issubclass(category, oc.OrthoCCPWarning):
            print(f"{PROG}: warning: {text}", file=sys.stderr)
        elif debug:
            where = f"{category.__name__}, {filename}:{lineno}"
            print(f"{PROG}: warning ({where}): {text}", file=sys.stderr)

    with warnings.catch_warnings():
        warnings.simplefilter("default")
        warnings.showwarning = show
        yield


def _display_path(path: Path) -> str:
    """``path`` relative to the working directory when it lies below it, else absolute."""
    absolute = path.absolute()
    try:
        return str(absolute.relative_to(Path.cwd()))
    except ValueError:
        return str(absolute)


def _output_path(option: str, value: str | None) -> Path | None:
    """An output option as a path (``None`` for no file or ``-``, stdout).

    The paths are checked together by :func:`orthoccp._outputs.check_outputs` before the
    (possibly long) estimation runs.
    """
    if value is None or value == "-":
        return None
    return Path(value)


def _write_text(path: Path, text: str) -> None:
    with writing(path):
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(text, encoding="utf-8")


# --------------------------------------------------------------------------- JSON
def _json_safe(value: Any, where: str, nulls: dict[str, str]) -> Any:
    """Plain JSON values; non-finite numbers become ``None`` and their reason is recorded."""
    if isinstance(value, dict):
        return {
            str(k): _json_safe(v, f"{where}.{k}" if where else str(k), nulls)
            for k, v in value.items()
        }
    if isinstance(value, (list, tuple)):
        return [_json_safe(v, f"{where}[{i}]", nulls) for i, v in enumerate(value)]
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        nulls[where] = "NaN: not defined for this fit" if math.isnan(value) else "infinite"
        return None
    if value is None:
        nulls[where] = ("not applicable to this fit (e.g. a split spread with one split), or not "
                        "a finite number; written as null")
        return None
    if isinstance(value, (str, int, float, bool)):
        return value
    return str(value)


def name_value_pairs(items: list[str] | None, option: str, example: str) -> dict[str, str]:
    """Repeated ``--option NAME=VALUE`` arguments as a mapping (names unique, values non-empty)."""
    out: dict[str, str] = {}
    for item in items or []:
        name, sep, value = item.partition("=")
        name = name.strip()
        if not sep or not name or not value.strip():
            raise oc.InputError(f"{option} {item!r}: write NAME=VALUE, e.g. {option} {example}.")
        if name in out:
            raise oc.InputError(f"{option}: the name {name!r} is given twice.")
        out[name] = value
    return out


def parse_functions(items: list[str] | None) -> dict[str, str] | None:
    """``--function NAME=EXPR`` options as a mapping (None when there are none)."""
    return name_value_pairs(items, "--function", "'wear_in_swaps=wear_cost/swap_cost'") or None


def write_outputs(outputs: dict[str, Path | None], writers: dict[str, Callable[[Path], Any]]) -> None:
    """Write each requested output with its writer and say so."""
    for option, path in outputs.items():
        if path is not None:
            writers[option](path)
            print(f"wrote {path}")


def results_payload(res: oc.Results, *, inputs: dict[str, str] | None = None,
                    functions: dict[str, str] | None = None) -> dict[str, Any]:
    """The JSON document written by ``orthoccp estimate --json``.

    Parameters
    ----------
    res : Results
        An estimation result.
    inputs : dict, optional
        Names of the input files (``{"data": ..., "spec": ...}``), recorded under ``inputs``.
    functions : dict, optional
        Functions of the parameters (``--function``), recorded under ``functions`` with
        delta-method intervals (:meth:`Results.derive`).

    Returns
    -------
    dict
        :meth:`Results.to_dict` (estimates with 95 % intervals, sample sizes, first-stage
        settings, timings, clipping counts, version, ...) made strictly JSON-safe: no NaN or
        infinity is ever written; such values are ``null`` and ``nulls`` maps each one's
        location (``"params[0].std_error"``) to the reason. ``inputs`` echoes the files.
    """
    raw = res.to_dict(0.95)
    if functions:
        raw["functions"] = [dict(r, expression=functions[r["name"]])
                            for r in param_records(res.derive(functions, level=0.95))]
    nulls: dict[str, str] = {}
    doc = _json_safe(raw, "", nulls)
    doc["inputs"] = dict(inputs or {})
    doc["nulls"] = nulls
    return doc


def _dumps(doc: dict[str, Any]) -> str:
    return json.dumps(doc, indent=2, allow_nan=False) + "\n"
