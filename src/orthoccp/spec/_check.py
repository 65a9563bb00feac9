"""Spec vocabularies, :class:`SpecError` and the checker that turns bad values into messages."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from .._errors import InputError
from .._options import OPTIONS, check_option, describe_value

KINDS = ("renewal", "terminal")
SCHEMES = OPTIONS["scheme"].valid_choices()
MOMENTS = ("standard", "renewal_robust")
MISSING = ("error", "drop")
METHODS = ("orthogonal", "npl", "pml")
VALUES = ("inversion", "simulation")
TRANSITIONS = ("frequency", "increments")
INITIAL_CCPS = ("frequency", "sieve")


class SpecError(InputError):
    """A spec file (or a spec option) that is malformed, mistyped or inconsistent.

    Parameters
    ----------
    message : str
        Full message; it names the file, the key and the offending value.
    key : str, optional
        Dotted key the error is about (``"first_stage.folds"``), for programmatic use.
    """

    def __init__(self, message: str, *, key: str | None = None) -> None:
        super().__init__(message)
        self.key = key


def _where(source: Path | None) -> str:
    return f"{source}: " if source is not None else ""


_show = describe_value


class _Checker:
    """Type and range checks whose errors name the file and the dotted key."""

    def __init__(self, source: Path | None) -> None:
        self.source = source

    def fail(self, key: str, message: str) -> SpecError:
        return SpecError(f"{_where(self.source)}{message}", key=key)

    def option(self, key: str, name: str, value: Any) -> Any:
        """A shared option (:data:`orthoccp._options.OPTIONS`), with its one message."""
        try:
            return check_option(name, value, label=key)
        except InputError as exc:
            raise self.fail(key, str(exc)) from None

    def table(self, key: str, value: Any) -> Mapping[str, Any]:
        if not isinstance(value, Mapping):
            raise self.fail(key, f"{key} must be a table, got {_show(value)}.")
        return value

    def keys(self, key: str, table: Mapping[str, Any], valid: Sequence[str]) -> None:
        unknown = [k for k in table if k not in valid]
        if not unknown:
            return
        if not key:
            raise self.fail(
                unknown[0],
                f"unknown table or key {unknown[0]!r} at the top level; valid tables: "
                f"{', '.join(valid)}.",
            )
        raise self.fail(
            f"{key}.{unknown[0]}",
            f"unknown key {unknown[0]!r} in [{key}]; valid keys: {', '.join(valid)}.",
        )

    def required(self, key: str, table: Mapping[str, Any], name: str, what: str) -> Any:
        if name not in table:
            raise self.fail(f"{key}.{name}", f"missing required key {key}.{name} ({what}).")
        return table[name]

    def string(self, key: str, value: Any) -> str:
        if not isinstance(value, str):
            raise self.fail(key, f"{key} must be a string, got {_show(value)}.")
        if not value:
            raise self.fail(key, f"{key} must not be empty.")
        return value

    def strings(self, key: str, value: Any, *, allow_empty: bool) -> tuple[str, ...]:
        if not isinstance(value, (list, tuple)):
            raise self.fail(key, f"{key} must be an array of strings, got {_show(value)}.")
        for item in value:
            if not isinstance(item, str) or not item:
                raise self.fail(
                    key, f"{key} must be an array of non-empty strings; element {_show(item)}."
                )
        if not value and not allow_empty:
            raise self.fail(key, f"{key} must name at least one column, got [].")
        dup = [v for v in value if list(value).count(v) > 1]
        if dup:
            raise self.fail(key, f"{key} lists {dup[0]!r} twice.")
        return tuple(value)

    def integer(self, key: str, value: Any, *, minimum: int) -> int:
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
            raise self.fail(key, f"{key} must be an integer >= {minimum}, got {_show(value)}.")
        if value < minimum:
            raise self.fail(key, f"{key} must be an integer >= {minimum}, got {value!r}.")
        return int(value)

    def number(self, key: str, value: Any) -> float:
        if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
            raise self.fail(key, f"{key} must be a number, got {_show(value)}.")
        out = float(value)
        if not math.isfinite(out):
            raise self.fail(key, f"{key} must be a finite number, got {value!r}.")
        return out

    def boolean(self, key: str, value: Any) -> bool:
        if not isinstance(value, (bool, np.bool_)):
            raise self.fail(key, f"{key} must be true or false, got {_show(value)}.")
        return bool(value)

    def choice(self, key: str, value: Any, valid: Sequence[str]) -> str:
        text = self.string(key, value)
        if text not in valid:
            raise self.fail(
                key,
                f"{key} must be one of {', '.join(repr(v) for v in valid)}, got {text!r}.",
            )
        return text

    def label(self, key: str, value: Any) -> str | int:
        if isinstance(value, bool) or not isinstance(value, (str, int)):
            raise self.fail(
                key, f"{key} must be a choice label (string or integer), got {_show(value)}."
            )
        if isinstance(value, str) and not value:
            raise self.fail(key, f"{key} must not be empty.")
        return value
