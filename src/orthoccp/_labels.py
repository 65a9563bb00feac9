"""Choice and stratum labels: the one matcher of the package, and how labels print.

Every place that matches a label given by the user (a key of ``utility=``, the anchor, a spec
key, a ``reset_choices`` entry, a transition matrix key, a counterfactual stratum) against the
labels observed in the data uses :func:`find_label`, so the rules are the same everywhere:

1. exact match: the same value and the same kind (text with text, number with number; a
   number matches across int, float and NumPy types, so ``1 == 1.0 == np.int64(1)``);
2. otherwise numeric equivalence between a number and text that spells it exactly (the
   TOML table key ``"1"`` of ``[utility.1]`` matches the label ``1`` or ``1.0``).

Labels are never matched by prefix, by stripping whitespace or by ignoring case; labels that
differ only that way are reported as near-duplicates (:func:`near_duplicates`).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable, Sequence
from typing import Any

import numpy as np

from ._errors import InputError

__all__ = [
    "plain_label",
    "show_label",
    "show_labels",
    "find_label",
    "match_label",
    "match_keys",
    "near_duplicates",
    "check_declared",
    "declare_in_python",
    "keys_by_label",
]


def plain_label(value: Any) -> Any:
    """NumPy scalars to Python scalars, so labels print and serialise cleanly."""
    return value.item() if isinstance(value, np.generic) else value


def show_label(value: Any) -> str:
    """A label as it should appear in a message: ``'keep'``, ``8``, ``1.5`` (never
    ``np.int64(8)``)."""
    return repr(plain_label(value))


def show_labels(values: Iterable[Any]) -> str:
    """Labels for a message, comma separated (see :func:`show_label`)."""
    return ", ".join(show_label(v) for v in values)


def _number(value: Any) -> float | int | None:
    """The value of a numeric label (bool excluded), else None."""
    value = plain_label(value)
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return None
    return value


def _spelled_number(text: str) -> float | int | None:
    """The number that ``text`` spells exactly (no surrounding whitespace), else None."""
    if not text or text != text.strip():
        return None
    try:
        return int(text)
    except ValueError:
        pass
    try:
        value = float(text)
    except ValueError:
        return None
    return value if math.isfinite(value) else None


def _exact(a: Any, b: Any) -> bool:
    a, b = plain_label(a), plain_label(b)
    na, nb = _number(a), _number(b)
    if na is not None or nb is not None:
        return na is not None and nb is not None and na == nb
    if isinstance(a, bool) or isinstance(b, bool):
        return type(a) is type(b) and a == b
    if isinstance(a, str) or isinstance(b, str):
        return isinstance(a, str) and isinstance(b, str) and a == b
    try:
        return bool(a == b)
    except (TypeError, ValueError):
        return False


def _numeric_text(a: Any, b: Any) -> bool:
    a, b = plain_label(a), plain_label(b)
    for num, text in ((a, b), (b, a)):
        n = _number(num)
        if n is not None and isinstance(text, str):
            spelled = _spelled_number(text)
            if spelled is not None and spelled == n:
                return True
    return False


def find_label(label: Any, labels: Sequence[Any], *, role: str = "label") -> int | None:
    """Position of ``label`` among ``labels`` by the package's rules, or None.

    Parameters
    ----------
    label : hashable
        The label the user gave.
    labels : sequence
        The candidate labels (typically the observed choices).
    role : str, default="label"
        What the label is, for the message when it matches more than one candidate.

    Returns
    -------
    int or None

    Raises
    ------
    InputError
        When ``label`` matches several candidates equally well (e.g. ``1`` against the text
        labels ``"1"`` and ``"1.0"``).
    """
    for rule in (_exact, _numeric_text):
        hits = [k for k, c in enumerate(labels) if rule(label, c)]
        if len(hits) == 1:
            return hits[0]
        if len(hits) > 1:
            raise InputError(
                f"{role} {show_label(label)} matches several labels "
                f"({show_labels(labels[k] for k in hits)}); write it exactly as in the data."
            )
    return None


def _fold(value: Any) -> Any:
    value = plain_label(value)
    return value.strip().casefold() if isinstance(value, str) else None


def near_duplicates(label: Any, labels: Sequence[Any]) -> list[int]:
    """Positions of the labels that differ from ``label`` only by case or surrounding
    whitespace (``"keep"`` and ``"Keep "``), the label itself excluded."""
    key = _fold(label)
    if key is None:
        return []
    return [k for k, c in enumerate(labels) if _fold(c) == key and not _exact(label, c)]


def match_label(
    label: Any,
    labels: Sequence[Any],
    *,
    role: str,
    column: str | None = None,
    counts: Sequence[int] | None = None,
) -> int:
    """Position of ``label`` among the observed ``labels``, or an InputError that lists them.

    Parameters
    ----------
    label : hashable
        The label the user gave (e.g. the anchor).
    labels : sequence
        The observed labels.
    role : str
        What the label is, e.g. ``"anchor"``, for the message.
    column : str, optional
        The data column the labels come from, for the message.
    counts : sequence of int, optional
        Rows per observed label; a near-duplicate spelling is then shown with its count.

    Returns
    -------
    int
    """
    k = find_label(label, labels, role=role)
    if k is not None:
        return k
    where = f" in column {column!r}" if column is not None else " in the data"
    near = near_duplicates(label, labels)
    hint = "check the label's spelling and type"
    if near:
        spelled = ", ".join(
            show_label(labels[i]) + ("" if counts is None else f" ({int(counts[i])} rows)")
            for i in near
        )
        hint = (f"the data spell it {spelled}: labels must match exactly (case and surrounding "
                f"whitespace count)")
    raise InputError(
        f"{role} {show_label(label)} is not among the choices observed{where} "
        f"({show_labels(labels)}); {hint}."
    )


def match_keys(
    keys: Iterable[Any],
    labels: Sequence[Any],
    *,
    role: str,
    column: str | None = None,
    counts: Sequence[int] | None = None,
    skip_unknown: bool = False,
) -> dict[Any, int]:
    """Positions of several keys (e.g. the choices of ``utility=``); two keys for the same
    label are an error.

    Parameters
    ----------
    skip_unknown : bool, default=False
        Leave out keys that match no label instead of raising (the caller reports them).

    Returns
    -------
    dict
        Key -> position in ``labels``.

    Raises
    ------
    InputError
        When a key is not observed (see :func:`match_label`) or two keys name the same
        label (``0`` and ``"0"``).
    """
    out: dict[Any, int] = {}
    first: dict[int, Any] = {}
    for key in keys:
        if skip_unknown:
            hit = find_label(key, labels, role=role)
            if hit is None:
                continue
            k = hit
        else:
            k = match_label(key, labels, role=role, column=column, counts=counts)
        if k in first:
            raise InputError(
                f"two keys for the same choice: {role} {show_label(first[k])} and "
                f"{show_label(key)} both name {show_label(labels[k])}; keep one of them."
            )
        first[k] = key
        out[key] = k
    return out


def check_declared(
    declared: Iterable[int],
    labels: Sequence[Any],
    counts: Sequence[int],
    *,
    column: str,
    fix: Callable[[Any], str],
) -> None:
    """Every observed label must be declared: an undeclared one is an InputError giving its
    row count, and naming the declared label it nearly duplicates (case, whitespace).

    Parameters
    ----------
    declared : iterable of int
        Positions (in ``labels``) of the declared labels.
    labels : sequence
        The observed labels.
    counts : sequence of int
        Rows per observed label.
    column : str
        The data column, for the message.
    fix : callable
        Label -> how to declare it as a choice without parameters where the labels were
        given (API or spec); it ends the message.
    """
    declared = set(declared)
    missing = [k for k in range(len(labels)) if k not in declared]
    if not missing:
        return
    for k in missing:
        near = [i for i in near_duplicates(labels[k], labels) if i in declared]
        if near:
            i = near[0]
            raise InputError(
                f"column {column!r} spells a choice two ways: {show_label(labels[i])} "
                f"({int(counts[i])} rows) and {show_label(labels[k])} ({int(counts[k])} rows); "
                f"they differ only by case or surrounding whitespace. Clean the labels (e.g. "
                f"with .str.strip()), or declare both choices if they are different."
            )
    shown = ", ".join(f"{show_label(labels[k])} ({int(counts[k])} rows)" for k in missing)
    raise InputError(
        f"observed choice(s) {shown} in column {column!r} are not declared in the utility; "
        f"every observed choice needs an entry, a choice without parameters an empty one "
        f"({fix(plain_label(labels[missing[0]]))})."
    )


def declare_in_python(label: Any) -> str:
    """How to declare ``label`` without parameters in ``utility=`` (for :func:`check_declared`)."""
    return f"utility={{..., {show_label(label)}: {{}}}}"


def keys_by_label(keys: Iterable[Any], labels: Sequence[Any], *, role: str) -> list[Any]:
    """For each of ``labels``, the key of ``keys`` that names it (None when none does).

    Keys that name no label are ignored (the caller reports them); two keys for one label
    are an error (:func:`match_keys`).
    """
    out: list[Any] = [None] * len(labels)
    for key, k in match_keys(keys, labels, role=role, skip_unknown=True).items():
        out[k] = key
    return out
