"""First step of the two-step NFXP: state transition matrices from the observed transitions.

Three sources:

``"frequency"``
    cell frequencies :math:`\\hat F_j(s' \\mid s) = n_{j s s'} / n_{j s}`;
``"increments"``
    a pmf of state increments shared by all states (Rust 1987's first step for mileage):
    :math:`\\hat\\theta_{3k} = n_k / n`, the sample frequency of :math:`x' - b = k`;
given matrices
    one (S, S) matrix per choice, taken as known.
"""

from __future__ import annotations

from collections.abc import Hashable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .._errors import InputError
from .._labels import keys_by_label, show_label

__all__ = ["TransitionEstimate", "estimate_transitions"]


@dataclass(frozen=True, eq=False)
class TransitionEstimate:
    """Transition matrices and how they were obtained.

    Attributes
    ----------
    matrices : numpy.ndarray
        (J, S, S) row-stochastic :math:`F_j(s' \\mid s)`.
    method : str
        ``"frequency"``, ``"increments"`` or ``"given"``.
    increments : numpy.ndarray or None
        (K+1,) estimated increment pmf (``"increments"`` only).
    n_transitions : int
        Observed transitions (row with a next row one period later) used.
    unseen_cells : dict
        Per choice label, the number of states whose row had no observed transition and was
        filled (``"frequency"`` only; see :func:`estimate_transitions`).
    """

    matrices: np.ndarray
    method: str
    increments: np.ndarray | None = None
    n_transitions: int = 0
    unseen_cells: dict[Any, int] = field(default_factory=dict)


def estimate_transitions(
    state: np.ndarray,
    choice: np.ndarray,
    next_state: np.ndarray,
    *,
    n_states: int,
    choices: tuple[Hashable, ...],
    method: str | Mapping[Any, Any],
    anchor: int | None = None,
    reset_state: int = 0,
    max_increment: int | None = None,
) -> TransitionEstimate:
    """Estimate (or check given) transition matrices from linked state pairs.

    Parameters
    ----------
    state, choice, next_state : numpy.ndarray
        Integer arrays of equal length: state code, choice code (position in ``choices``) and
        the next period's state code of every linked row.
    n_states : int
        S.
    choices : tuple
        Choice labels (for messages and the ``unseen_cells`` keys).
    method : {"frequency", "increments"} or mapping
        How to obtain :math:`F`; a mapping choice label -> (S, S) row-stochastic matrix gives
        the matrices directly.
    anchor : int, optional
        Code of the renewal choice (after it the next state does not depend on the state).
        With ``"frequency"`` its rows are pooled over all states; with ``"increments"`` its
        increments are counted from ``reset_state``. None: no renewal choice.
    reset_state : int, default=0
        State the renewal choice resets to before the increment (``"increments"``).
    max_increment : int, optional
        Largest increment K (``"increments"``); default the largest observed one.

    Returns
    -------
    TransitionEstimate

    Notes
    -----
    ``"frequency"``: rows of :math:`\\hat F_j` for states where choice j was never followed by
    an observed next state are filled with choice j's pooled next-state frequency (over all
    states); for a renewal choice that is its model-implied row, for any other choice it is a
    crude fill, counted in ``unseen_cells``. Such rows carry no likelihood information on
    their own; they matter only through the values of states reached from observed cells.

    ``"increments"``: with base :math:`b = s` (or ``reset_state`` after the renewal choice),
    increments :math:`k = s' - b` are counted over the transitions with
    :math:`b + K \\le S - 1`, where no increment can be censored by the last state, and
    :math:`\\hat\\theta_{3k} = n_k / \\sum_l n_l`: the maximum-likelihood estimate from those
    transitions (Rust 1987, first step). Then
    :math:`\\hat F_j(s' \\mid s) = \\sum_k \\hat\\theta_{3k} 1\\{s' = \\min(b_j(s) + k, S-1)\\}`.
    """
    S = int(n_states)
    J = len(choices)
    state = np.asarray(state, dtype=np.int64)
    choice = np.asarray(choice, dtype=np.int64)
    next_state = np.asarray(next_state, dtype=np.int64)

    if isinstance(method, Mapping):
        return _given(method, S, choices)
    if method == "frequency":
        return _frequency(state, choice, next_state, S, choices, anchor)
    if method == "increments":
        return _increments(state, choice, next_state, S, J, choices, anchor, reset_state,
                           max_increment)
    raise InputError(
        f"transitions must be 'frequency', 'increments' or a mapping choice -> (S, S) matrix, "
        f"got {method!r}."
    )


def _given(
    method: Mapping[Any, Any], S: int, choices: tuple[Hashable, ...]
) -> TransitionEstimate:
    mats = np.empty((len(choices), S, S))
    for j, (c, key) in enumerate(zip(choices, keys_by_label(method, choices, role="transitions key"))):
        if key is None:
            raise InputError(
                f"transitions has no matrix for choice {c!r}; give one (S, S) matrix per choice "
                f"({', '.join(map(repr, choices))})."
            )
        m = np.asarray(method[key], dtype=np.float64)
        if m.shape != (S, S):
            raise InputError(
                f"transitions[{c!r}] must have shape ({S}, {S}) (the number of states), got "
                f"{m.shape}."
            )
        if not np.all(np.isfinite(m)) or m.min() < 0 or np.max(np.abs(m.sum(axis=1) - 1)) > 1e-9:
            raise InputError(
                f"transitions[{c!r}] must be row-stochastic (non-negative rows summing to 1)."
            )
        mats[j] = m
    return TransitionEstimate(matrices=mats, method="given")


def _frequency(
    state: np.ndarray,
    choice: np.ndarray,
    next_state: np.ndarray,
    S: int,
    choices: tuple[Hashable, ...],
    anchor: int | None,
) -> TransitionEstimate:
    J = len(choices)
    counts = np.zeros((J, S, S))
    np.add.at(counts, (choice, state, next_state), 1.0)
    mats = np.empty_like(counts)
    unseen: dict[Any, int] = {}
    for j in range(J):
        pooled = counts[j].sum(axis=0)
        if pooled.sum() == 0:
            raise InputError(
                f"choice {show_label(choices[j])} is never followed by an observed next state; its "
                f"transition matrix cannot be estimated by frequencies. Pass it as a given "
                f"matrix (transitions={{...}})."
            )
        pooled = pooled / pooled.sum()
        if anchor is not None and j == anchor:
            mats[j] = pooled[None, :]
            unseen[choices[j]] = 0
            continue
        rows = counts[j].sum(axis=1)
        seen = rows > 0
        mats[j] = np.where(seen[:, None], counts[j] / np.where(seen, rows, 1.0)[:, None], pooled)
        unseen[choices[j]] = int((~seen).sum())
    return TransitionEstimate(
        matrices=mats, method="frequency", n_transitions=int(state.size), unseen_cells=unseen
    )


def _increments(
    state: np.ndarray,
    choice: np.ndarray,
    next_state: np.ndarray,
    S: int,
    J: int,
    choices: tuple[Hashable, ...],
    anchor: int | None,
    reset_state: int,
    max_increment: int | None,
) -> TransitionEstimate:
    if not isinstance(reset_state, (int, np.integer)) or not 0 <= reset_state < S:
        raise InputError(f"reset_state must be a state in 0..{S - 1}, got {reset_state!r}.")
    base = state.copy()
    if anchor is not None:
        base[choice == anchor] = reset_state
    inc = next_state - base
    if inc.size == 0:
        raise InputError("no observed transitions (rows followed by the next period's row).")
    if (inc < 0).any():
        bad = int((inc < 0).sum())
        raise InputError(
            f"{bad} transitions decrease the state (next state below the current state, or "
            f"below reset_state={reset_state} after the renewal choice); "
            f"transitions='increments' needs non-decreasing states. Use 'frequency'."
        )
    K = int(inc.max()) if max_increment is None else int(max_increment)
    if K < 0 or K > S - 1:
        raise InputError(f"max_increment must be in 0..{S - 1}, got {max_increment!r}.")
    uncensored = base + K <= S - 1
    if (inc[uncensored] > K).any():
        raise InputError(
            f"an observed increment exceeds max_increment={K}; raise max_increment."
        )
    if not uncensored.any():
        raise InputError(
            "every transition starts within max_increment of the last state, where increments "
            "are censored; no increment can be counted."
        )
    pmf = np.bincount(inc[uncensored], minlength=K + 1).astype(np.float64)
    pmf /= pmf.sum()
    rows = np.arange(S)
    mats = np.zeros((J, S, S))
    for j in range(J):
        b = np.full(S, reset_state) if (anchor is not None and j == anchor) else rows
        for k, pk in enumerate(pmf):
            np.add.at(mats[j], (rows, np.minimum(b + k, S - 1)), pk)
    return TransitionEstimate(
        matrices=mats,
        method="increments",
        increments=pmf,
        n_transitions=int(uncensored.sum()),
    )
