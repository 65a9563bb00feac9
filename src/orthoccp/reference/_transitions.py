"""First step of the two-step NFXP: state transition matrices from the observed transitions.

The computation is the discrete-state estimators' first step
(:func:`orthoccp.discrete.estimate_transition_matrices`, without smoothing), returned as dense
arrays for the full-solution likelihood. Three sources:

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
from ..discrete._transitions import estimate_transition_matrices

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
    state = np.asarray(state, dtype=np.int64)
    choice = np.asarray(choice, dtype=np.int64)
    next_state = np.asarray(next_state, dtype=np.int64)
    increment_range = None
    if isinstance(method, Mapping) or method == "frequency":
        pass
    elif method == "increments":
        increment_range = (0, _largest_increment(state, choice, next_state, S, anchor,
                                                 reset_state, max_increment))
    else:
        raise InputError(
            f"transitions must be 'frequency', 'increments' or a mapping choice -> (S, S) "
            f"matrix, got {method!r}."
        )
    tm = estimate_transition_matrices(
        state, choice, next_state, n_states=S, choices=choices, method=method,
        reset_choices=() if anchor is None else (choices[anchor],), reset_state=reset_state,
        increment_range=increment_range,
    )
    return TransitionEstimate(matrices=tm.dense(), method=tm.method, increments=tm.increments,
                              n_transitions=tm.n_transitions, unseen_cells=dict(tm.unseen))


def _largest_increment(state: np.ndarray, choice: np.ndarray, next_state: np.ndarray, S: int,
                       anchor: int | None, reset_state: Any, max_increment: int | None) -> int:
    """K of Rust's (1987) first step: ``max_increment``, or the largest observed increment,
    after checking that the states never decrease (the increments start at 0)."""
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
    if (inc[base + K <= S - 1] > K).any():
        raise InputError(f"an observed increment exceeds max_increment={K}; raise max_increment.")
    return K
