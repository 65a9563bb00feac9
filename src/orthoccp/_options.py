"""The shared options: one declarative table and one validator.

Every entry point that takes one of these options (:func:`orthoccp.estimate`,
:func:`orthoccp.estimate_moments`, :func:`orthoccp.estimate_discrete`, :class:`orthoccp.Model`,
:func:`orthoccp.fold_stability`, the spec reader, the Monte Carlo settings and the command line)
checks it with :func:`check_option`, so a bad value gets the same message everywhere. Only the
name in front changes: ``folds`` from Python, ``first_stage.folds`` in a spec file, ``--folds``
on the command line.

A message names the option, states what it must be (which is the fix) and shows the bad value;
a value of the wrong type also shows its type, in words that read the same from Python and
TOML (``'3' (string)``).
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np

from ._errors import InputError

__all__ = ["Option", "OPTIONS", "check_option", "check_options", "describe_value", "type_name"]

Kind = Literal["integer", "number", "choice", "boolean"]


def type_name(value: Any) -> str:
    """A value's type in words shared by Python and TOML (``string``, ``integer``, ...)."""
    if isinstance(value, (bool, np.bool_)):
        return "boolean"
    if isinstance(value, numbers.Integral):
        return "integer"
    if isinstance(value, numbers.Real):
        return "float"
    if isinstance(value, str):
        return "string"
    if isinstance(value, (list, tuple)):
        return "array"
    if isinstance(value, Mapping):
        return "table"
    return type(value).__name__


def describe_value(value: Any) -> str:
    """``repr`` (cut at 60 characters) and the type: ``'3' (string)``."""
    text = repr(value)
    if len(text) > 60:
        text = text[:57] + "..."
    return f"{text} ({type_name(value)})"


@dataclass(frozen=True)
class Option:
    """One shared option: its type, bounds, default and help text.

    Parameters
    ----------
    name : str
        The keyword of the Python API.
    kind : {"integer", "number", "choice", "boolean"}
        What the value must be.
    default : object
        The default of :func:`orthoccp.estimate` (``None`` when the option is required or has
        no default there).
    help : str
        One line for documentation and the command line.
    low, high : float, optional
        Bounds of an integer (``low`` only: ``>= low``) or a number (an interval).
    open_low, open_high : bool, default=False
        Whether a number's bounds are excluded.
    noun : str, default="a number"
        What a number is called in the message (``"a probability"``).
    choices : tuple of str or callable, optional
        The valid names of a choice (a callable for a registry read when checking).
    requirement : str, optional
        The whole requirement, when the generated one does not fit (``jobs``).
    also : tuple of int, default=()
        Further integers that are valid outside the bounds (``-1`` for ``jobs``).
    note : str, default=""
        Why the bounds are what they are, or what else works, added to a message about a
        value of the right type that is out of range or not among the choices.
    """

    name: str
    kind: Kind
    default: Any
    help: str
    low: float | None = None
    high: float | None = None
    open_low: bool = False
    open_high: bool = False
    noun: str = "a number"
    choices: tuple[str, ...] | Callable[[], tuple[str, ...]] = ()
    requirement: str = ""
    also: tuple[int, ...] = ()
    note: str = ""

    def valid_choices(self) -> tuple[str, ...]:
        """The valid names of a choice option."""
        return self.choices() if callable(self.choices) else self.choices

    def interval(self) -> str:
        """The bounds of a number, in interval notation (``[0, 1)``)."""
        lo = "(" if self.open_low else "["
        hi = ")" if self.open_high else "]"
        return f"{lo}{_number(self.low)}, {_number(self.high)}{hi}"

    def describe(self) -> str:
        """What a valid value is: ``an integer >= 2``, ``a probability in (0, 0.5)``, ..."""
        if self.requirement:
            return self.requirement
        if self.kind == "integer":
            return f"an integer >= {_number(self.low)}"
        if self.kind == "number":
            return f"{self.noun} in {self.interval()}"
        if self.kind == "boolean":
            return "true or false"
        return "one of " + ", ".join(repr(c) for c in self.valid_choices())

    def check(self, value: Any, *, label: str | None = None, note: str | None = None) -> Any:
        """The value, checked; the parameters are :func:`check_option`'s."""
        key = label or self.name
        wrong_type = f"{key} must be {self.describe()}, got {describe_value(value)}."
        note = self.note if note is None else note
        note = f"; {note}" if note else ""
        if self.kind == "boolean":
            if not isinstance(value, (bool, np.bool_)):
                raise InputError(wrong_type)
            return bool(value)
        if self.kind == "choice":
            if not isinstance(value, str):
                raise InputError(wrong_type)
            if value not in self.valid_choices():
                raise InputError(f"{key} must be {self.describe()}, got {value!r}{note}.")
            return value
        if isinstance(value, bool) or not isinstance(value, numbers.Real):
            raise InputError(wrong_type)
        if self.kind == "integer":
            if not isinstance(value, numbers.Integral):
                raise InputError(wrong_type)
            if int(value) in self.also or (self.low is not None and value >= self.low):
                return int(value)
            raise InputError(f"{key} must be {self.describe()}, got {value!r}{note}.")
        number = float(value)
        inside = math.isfinite(number)
        if self.low is not None:
            inside = inside and (number > self.low if self.open_low else number >= self.low)
        if self.high is not None:
            inside = inside and (number < self.high if self.open_high else number <= self.high)
        if not inside:
            where = self.requirement or (
                "a finite number" if self.low is None and self.high is None
                else f"in {self.interval()}" if self.noun == "a number" else self.describe()
            )
            raise InputError(f"{key} must be {where}, got {value!r}{note}.")
        return number


def _number(x: float | None) -> str:
    if x is None:
        return ""
    return str(int(x)) if float(x).is_integer() else repr(float(x))


def _learner_names() -> tuple[str, ...]:
    from .learners import learner_names

    return learner_names()


OPTIONS: Mapping[str, Option] = {
    o.name: o
    for o in (
        Option("folds", "integer", 5, "cross-fitting folds (units are split into this many)",
               low=2),
        Option("scheme", "choice", "nested",
               "cross-fitting scheme: 'nested' fits the CCP outside each pair of folds, "
               "'plain' outside each fold", choices=("plain", "nested")),
        Option("seed", "integer", 0, "seed of the folds and the learners", low=0),
        Option("splits", "integer", 1,
               "repeated fold splits, estimates combined by the median rule", low=1),
        Option("clip", "number", 1e-4,
               "CCPs are clipped to [clip, 1 - clip] before logs and divisions",
               low=0, high=0.5, open_low=True, open_high=True, noun="a probability"),
        Option("learner", "choice", "lightgbm",
               "first-stage learner of the CCPs (a registry name)", choices=_learner_names,
               note="from Python, a scikit-learn-style classifier also works"),
        Option("regressor", "choice", None,
               "learner of the continuation regressions (default: the learner's partner)",
               choices=_learner_names,
               note="from Python, a scikit-learn-style regressor also works"),
        Option("jobs", "integer", 1, "parallel workers (-1: one per core)", low=1, also=(-1,),
               requirement="a positive integer or -1 (one worker per core)"),
        Option("discount", "number", None, "discount factor beta of the infinite horizon",
               low=0, high=1, open_high=True,
               note="the infinite-horizon model needs a discount below 1 (0 gives a static "
                    "logit)"),
        Option("small_sample", "boolean", True,
               "multiply the clustered covariance by n/(n-1) (estimate_discrete's default is "
               "False)"),
        Option("debias", "boolean", True,
               "add the first-stage correction (False gives the plug-in estimator)"),
        Option("correction_weights", "choice", "solution",
               "where the correction's weights are evaluated: 'solution' solves "
               "sum m(theta) + phi(theta) = 0, 'plugin' fixes them at the plug-in solution",
               choices=("solution", "plugin")),
    )
}


def check_option(
    name: str, value: Any, *, label: str | None = None, note: str | None = None
) -> Any:
    """Check one shared option against :data:`OPTIONS`.

    Parameters
    ----------
    name : str
        The option's name in :data:`OPTIONS`.
    value : object
        The value given.
    label : str, optional
        How the option is spelled where it was given: ``"first_stage.folds"`` in a spec
        file, ``"--folds"`` on the command line, ``"n_jobs"`` for a keyword of another name.
    note : str, optional
        Replaces the option's note where it does not hold (``""`` drops it).

    Returns
    -------
    object
        The value as ``int``, ``float``, ``str`` or ``bool``.

    Raises
    ------
    orthoccp.InputError
        Naming the option, what it must be (the fix) and the bad value.

    Examples
    --------
    >>> check_option("folds", 3)
    3
    >>> check_option("clip", 0.7)
    Traceback (most recent call last):
    ...
    orthoccp._errors.InputError: clip must be a probability in (0, 0.5), got 0.7.
    """
    return OPTIONS[name].check(value, label=label, note=note)


def check_options(**values: Any) -> dict[str, Any]:
    """Check several shared options, in the order given.

    Parameters
    ----------
    **values
        Option name (a key of :data:`OPTIONS`) and value.

    Returns
    -------
    dict
        The checked values, as :func:`check_option` returns them.

    Raises
    ------
    orthoccp.InputError
        For the first bad value.
    """
    return {name: check_option(name, value) for name, value in values.items()}
