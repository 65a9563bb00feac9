"""Transition matrices per choice on a finite state space, with their influence functions.

Three sources (``method``):

``"frequency"``
    cell frequencies :math:`\\hat F_j(s' \\mid s) = n_{jss'} / n_{js}`, optionally smoothed
    toward the choice's pooled next-state distribution :math:`q_j` with ``smoothing``
    :math:`= \\alpha` pseudo-observations: :math:`(n_{jss'} + \\alpha q_j(s'))/(n_{js} + \\alpha)`.
    States where choice j was never followed by an observed next state get :math:`q_j`.
    Choices in ``reset_choices`` (after which the next state does not depend on the current
    one: a renewal) get :math:`q_j` in every row.
``"increments"``
    one pmf of state increments :math:`k = x' - b_j(x)` shared by all states and choices, with
    :math:`x' = \\min(\\max(b_j(x) + k, 0), S - 1)` (Rust 1987's first step for mileage). The
    base :math:`b_j(x)` is x, ``reset_state`` after a reset choice, or given per choice
    (``base``: e.g. the stock after an order, when demand then lowers it).
given
    a mapping choice -> (S, S) matrix (dense or ``scipy.sparse``), taken as known.

Matrices are ``scipy.sparse`` CSR, so large sparse state spaces stay cheap. Each estimate
knows the influence of every observed transition on itself, which the estimators use to add
the first step's sampling noise to their standard errors (:meth:`TransitionMatrices.directional`).
"""

from __future__ import annotations

from collections.abc import Hashable, Mapping, Sequence
import warnings
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import sparse

from .._arrays import group_sums
from .._errors import InputError, OrthoCCPWarning
from .._labels import keys_by_label, match_label, show_label

__all__ = ["TransitionMatrices", "estimate_transition_matrices"]


@dataclass(frozen=True, eq=False)
class TransitionMatrices:
    """Estimated (or given) transition matrices and the data they came from.

    Attributes
    ----------
    matrices : tuple of scipy.sparse.csr_matrix
        J row-stochastic (S, S) matrices :math:`F_j(s' \\mid s)`.
    method : str
        ``"frequency"``, ``"increments"`` or ``"given"``.
    n_transitions : int
        Observed transitions (a row followed by the unit's next-period row) used.
    unseen : dict
        Per choice label, the states whose row had no observed transition
        (``"frequency"``; they got the pooled distribution).
    smoothing : float
        :math:`\\alpha` (``"frequency"``).
    increments : numpy.ndarray or None
        (K+1,) estimated increment pmf (``"increments"``).
    """

    matrices: tuple[sparse.csr_matrix, ...]
    method: str
    n_transitions: int = 0
    unseen: dict[Any, int] = field(default_factory=dict)
    smoothing: float = 0.0
    increments: np.ndarray | None = None
    _obs: dict[str, np.ndarray] = field(default_factory=dict, repr=False)

    @property
    def n_states(self) -> int:
        return int(self.matrices[0].shape[0])

    def dense(self) -> np.ndarray:
        """(J, S, S) dense copy (for small state spaces and checks)."""
        return np.stack([m.toarray() for m in self.matrices])

    def directional(self, omega: np.ndarray, value: np.ndarray, n_units: int) -> np.ndarray:
        """Per-unit first-order effect of the transition estimate on :math:`\\sum \\omega' F V`.

        Parameters
        ----------
        omega : numpy.ndarray
            (S, J, p) weights :math:`\\omega_j(s)`.
        value : numpy.ndarray
            (S,) :math:`V`.
        n_units : int
            Number of units (codes of the observed transitions run 0..n_units-1).

        Returns
        -------
        numpy.ndarray
            (n_units, p): for unit i, :math:`\\sum_{s,j} \\omega_j(s)\\,(D^{(i)}_j V)(s)` with
            :math:`D^{(i)} = \\sum_{t \\in i} \\mathrm{IF}_t` the sum of the influence functions of
            unit i's transitions on :math:`\\hat F` (zero for given matrices).

        Notes
        -----
        Frequencies: a transition :math:`t = (\\sigma, k, s')` moves row :math:`\\sigma` of
        :math:`\\hat F_k` by :math:`(e_{s'} - \\hat F_k(\\sigma))/(n_{k\\sigma} + \\alpha)` and
        every row s by :math:`r_{ks}(e_{s'} - q_k)/n_k` through :math:`q_k`, where
        :math:`r_{ks} = \\alpha/(n_{ks}+\\alpha)` (1 for unseen rows and reset choices).
        Increments: an uncensored transition with increment :math:`\\kappa` moves the pmf by
        :math:`(e_\\kappa - \\hat\\theta_3)/n_{unc}`, and :math:`F_j` is linear in the pmf.
        """
        p = omega.shape[2]
        out = np.zeros((n_units, p))
        if self.method == "given" or not self._obs:
            return out
        o = self._obs
        unit = o["unit"]
        if self.method == "increments":
            pmf = np.asarray(self.increments)
            base, lo = o["base"], int(o["low"][0])
            S = omega.shape[0]
            # B[k] = sum_j sum_s omega_j(s) V(clip(b_j(s) + lo + k)): the score's derivative
            # in the pmf's k-th mass
            landing = np.clip(base[:, :, None] + lo + np.arange(pmf.size), 0, S - 1)  # (J, S, K)
            B = np.einsum("jsk,sjp->kp", value[landing], omega)
            use = o["uncensored"]
            # sum over unit i's uncensored transitions of (B[k_t] - pmf'B) / n_unc, from the
            # unit's count of each increment
            K = pmf.size
            per_unit_k = np.bincount(unit[use] * K + (o["increment"][use] - lo),
                                     minlength=n_units * K).reshape(n_units, K)
            n_unc = max(int(use.sum()), 1)
            return (per_unit_k @ B - per_unit_k.sum(axis=1)[:, None] * (pmf @ B)[None, :]) / n_unc
        s, a, s1 = o["state"], o["choice"], o["next_state"]
        FV = np.stack([m @ value for m in self.matrices], axis=1)  # (S, J)
        n_js, n_j, q = o["row_counts"], o["choice_counts"], o["pooled"]
        alpha = self.smoothing
        r = np.where(n_js == 0, 1.0, alpha / np.maximum(n_js + alpha, 1e-300))  # (S, J)
        r[:, o["resets"]] = 1.0
        own = np.ones_like(r)
        own[:, o["resets"]] = 0.0
        qV = np.array([q[j] @ value for j in range(len(self.matrices))])
        denom = n_js[s, a] + alpha
        direct = own[s, a][:, None] * omega[s, a, :] * ((value[s1] - FV[s, a]) / denom)[:, None]
        spread = np.einsum("sj,sjp->jp", r, omega)  # (J, p)
        pooled = spread[a] * ((value[s1] - qV[a]) / n_j[a])[:, None]
        return group_sums(unit, direct + pooled, n_units)


def _choice_positions(labels: Sequence[Hashable], choices: Sequence[Hashable], role: str) -> np.ndarray:
    return np.asarray([match_label(lab, choices, role=role) for lab in labels], dtype=np.int64)


def estimate_transition_matrices(
    state: np.ndarray,
    choice: np.ndarray,
    next_state: np.ndarray,
    *,
    n_states: int,
    choices: Sequence[Hashable],
    method: str | Mapping[Any, Any] = "frequency",
    smoothing: float = 0.0,
    reset_choices: Sequence[Hashable] = (),
    reset_state: int = 0,
    increment_range: tuple[int, int] | None = None,
    base: Mapping[Any, Any] | None = None,
    unit: np.ndarray | None = None,
) -> TransitionMatrices:
    """Transition matrices per choice from observed state pairs.

    Parameters
    ----------
    state, choice, next_state : numpy.ndarray
        Integer arrays of equal length: the state code, the choice's position in
        ``choices`` and the next period's state code of each observed transition.
    n_states : int
        S.
    choices : sequence
        Choice labels (the J axis).
    method : {"frequency", "increments"} or mapping, default="frequency"
        See the module description; a mapping gives one (S, S) matrix per choice label.
    smoothing : float, default=0.0
        :math:`\\alpha \\ge 0`, pseudo-observations of the pooled distribution added to every
        row (``"frequency"``). Smoothed rows are dense over the pooled distribution's support.
    reset_choices : sequence, default=()
        Choice labels after which the next state's distribution does not depend on the
        current state (renewals): pooled over states (``"frequency"``), or counted from
        ``reset_state`` (``"increments"``).
    reset_state : int, default=0
        Where a reset choice restarts the state before the increment (``"increments"``).
    increment_range : (int, int), optional
        Smallest and largest increment (``"increments"``); default the observed range. A
        transition from a base state b with b + smallest < 0 or b + largest > S - 1 is
        censored (its increment could have been cut off at the edge) and does not enter the
        pmf; :attr:`TransitionMatrices.n_transitions` counts the ones that do, and an
        :class:`~orthoccp.OrthoCCPWarning` names the count when fewer than half do (often a
        restart choice missing from ``reset_choices``).
    base : mapping, optional
        Choice label -> (S,) integer base states :math:`b_j` (``"increments"``); choices not
        given use x (or ``reset_state`` for reset choices).
    unit : numpy.ndarray, optional
        Unit code of each transition, for the influence functions (default: all unit 0).

    Returns
    -------
    TransitionMatrices

    Examples
    --------
    >>> import numpy as np
    >>> tm = estimate_transition_matrices(np.array([0, 0, 1]), np.array([0, 0, 1]),
    ...                                   np.array([1, 0, 0]), n_states=2, choices=("a", "b"))
    >>> tm.dense()[0].tolist()
    [[0.5, 0.5], [0.5, 0.5]]
    """
    S = int(n_states)
    choices = tuple(choices)
    J = len(choices)
    state = np.asarray(state, dtype=np.int64)
    choice = np.asarray(choice, dtype=np.int64)
    next_state = np.asarray(next_state, dtype=np.int64)
    unit = np.zeros(state.size, dtype=np.int64) if unit is None else np.asarray(unit, dtype=np.int64)
    resets = _choice_positions(tuple(reset_choices), choices, "reset choice")
    if isinstance(method, Mapping):
        return _given(method, S, choices)
    if not isinstance(smoothing, (int, float, np.integer, np.floating)) or isinstance(smoothing, bool) \
            or not np.isfinite(smoothing) or smoothing < 0:
        raise InputError(f"smoothing must be a number >= 0, got {smoothing!r}.")
    if state.size == 0:
        raise InputError(
            "no observed transitions (a row followed by the same unit's row one period later); "
            "transition matrices cannot be estimated. Pass them as given matrices "
            "(transitions={choice: matrix, ...})."
        )
    if method == "frequency":
        return _frequency(state, choice, next_state, unit, S, choices, float(smoothing), resets)
    if method == "increments":
        return _increments(state, choice, next_state, unit, S, choices, resets, reset_state,
                           increment_range, base)
    raise InputError(
        f"transitions must be 'frequency', 'increments' or a mapping choice -> (S, S) matrix, "
        f"got {method!r}."
    )


def _given(method: Mapping[Any, Any], S: int, choices: tuple[Hashable, ...]) -> TransitionMatrices:
    mats = []
    for c, key in zip(choices, keys_by_label(method, choices, role="transitions key")):
        if key is None:
            raise InputError(
                f"transitions has no matrix for choice {c!r}; give one (S, S) matrix per choice "
                f"({', '.join(map(repr, choices))})."
            )
        m = sparse.csr_matrix(method[key], dtype=np.float64)
        if m.shape != (S, S):
            raise InputError(
                f"transitions[{c!r}] must have shape ({S}, {S}) (the number of states), got {m.shape}."
            )
        rows = np.asarray(m.sum(axis=1)).ravel()
        if not np.all(np.isfinite(m.data)) or (m.data < 0).any() or np.max(np.abs(rows - 1)) > 1e-9:
            raise InputError(
                f"transitions[{c!r}] must be row-stochastic (non-negative rows summing to 1)."
            )
        mats.append(m)
    return TransitionMatrices(matrices=tuple(mats), method="given")


def _frequency(
    state: np.ndarray,
    choice: np.ndarray,
    next_state: np.ndarray,
    unit: np.ndarray,
    S: int,
    choices: tuple[Hashable, ...],
    alpha: float,
    resets: np.ndarray,
) -> TransitionMatrices:
    J = len(choices)
    row_counts = np.bincount(state * J + choice, minlength=S * J).reshape(S, J).astype(np.float64)
    n_j = row_counts.sum(axis=0)
    mats: list[sparse.csr_matrix] = []
    pooled: list[np.ndarray] = []
    unseen: dict[Any, int] = {}
    for j in range(J):
        if n_j[j] == 0:
            raise InputError(
                f"choice {show_label(choices[j])} is never followed by an observed next state; its "
                f"transition matrix cannot be estimated by frequencies. Pass the matrices as "
                f"given (transitions={{choice: matrix, ...}})."
            )
        sel = choice == j
        C = sparse.csr_matrix(
            (np.ones(int(sel.sum())), (state[sel], next_state[sel])), shape=(S, S)
        )
        q = np.bincount(next_state[sel], minlength=S) / n_j[j]
        pooled.append(q)
        n = row_counts[:, j]
        if j in set(resets.tolist()):
            mats.append(sparse.kron(sparse.csr_matrix(np.ones((S, 1))),
                                    sparse.csr_matrix(q[None, :]), format="csr"))
            unseen[choices[j]] = 0
            continue
        fill = (n == 0).astype(np.float64) if alpha == 0 else np.full(S, alpha)
        outer = sparse.csr_matrix(fill[:, None]) @ sparse.csr_matrix(q[None, :])
        num = C + outer if (fill > 0).any() else C
        mats.append(sparse.csr_matrix(sparse.diags(1.0 / (n + fill)) @ num))
        unseen[choices[j]] = int((n == 0).sum())
    obs = {"state": state, "choice": choice, "next_state": next_state, "unit": unit,
           "row_counts": row_counts, "choice_counts": n_j, "pooled": np.stack(pooled),
           "resets": resets}
    return TransitionMatrices(
        matrices=tuple(mats), method="frequency", n_transitions=int(state.size), unseen=unseen,
        smoothing=alpha, _obs=obs,
    )


def _bases(
    S: int, choices: tuple[Hashable, ...], resets: np.ndarray, reset_state: int,
    base: Mapping[Any, Any] | None,
) -> np.ndarray:
    if isinstance(reset_state, bool) or not isinstance(reset_state, (int, np.integer)) \
            or not 0 <= reset_state < S:
        raise InputError(f"reset_state must be a state in 0..{S - 1}, got {reset_state!r}.")
    out = np.empty((len(choices), S), dtype=np.int64)
    given = dict(base or {})
    for j, (c, key) in enumerate(zip(choices, keys_by_label(given, choices, role="base key"))):
        if key is not None:
            b = np.asarray(given.pop(key))
            if b.shape != (S,) or np.any(b != np.round(b)) or b.min() < 0 or b.max() > S - 1:
                raise InputError(
                    f"base[{c!r}] must hold S = {S} integer states in 0..{S - 1}, got shape "
                    f"{b.shape}."
                )
            out[j] = b.astype(np.int64)
        else:
            out[j] = reset_state if j in set(resets.tolist()) else np.arange(S)
    if given:
        raise InputError(f"base names unknown choice(s) {sorted(map(str, given))}.")
    return out


def _widest_choice(
    inc: np.ndarray, choice: np.ndarray, choices: tuple[Hashable, ...], resets: np.ndarray
) -> str:
    """A hint naming the non-reset choice after which the increments spread most."""
    spread = {j: int(np.ptp(inc[choice == j])) for j in np.unique(choice)
              if j not in set(resets.tolist())}
    if not spread:
        return "Narrow increment_range, or check base."
    j = max(spread, key=lambda k: spread[k])
    low, high = int(inc[choice == j].min()), int(inc[choice == j].max())
    label = show_label(choices[j])
    return (
        f"After choice {label} the increments run from {low} to {high}: if that choice "
        f"restarts the state (a replacement, a renewal), pass reset_choices=[{label}] "
        f"(it restarts at reset_state); otherwise give its base states with base=, or narrow "
        f"increment_range."
    )


def _increments(
    state: np.ndarray,
    choice: np.ndarray,
    next_state: np.ndarray,
    unit: np.ndarray,
    S: int,
    choices: tuple[Hashable, ...],
    resets: np.ndarray,
    reset_state: int,
    increment_range: tuple[int, int] | None,
    base: Mapping[Any, Any] | None,
) -> TransitionMatrices:
    bases = _bases(S, choices, resets, reset_state, base)
    b = bases[choice, state]
    inc = next_state - b
    if increment_range is None:
        lo, hi = int(inc.min()), int(inc.max())
    else:
        try:
            lo, hi = (int(v) for v in increment_range)
        except (TypeError, ValueError) as exc:
            raise InputError(
                f"increment_range must be two integers (smallest, largest), got "
                f"{increment_range!r}."
            ) from exc
        if lo > hi:
            raise InputError(f"increment_range must have smallest <= largest, got {increment_range!r}.")
    uncensored = (b + lo >= 0) & (b + hi <= S - 1)
    if ((inc[uncensored] < lo) | (inc[uncensored] > hi)).any():
        raise InputError(
            f"an observed increment lies outside increment_range=({lo}, {hi}); widen it, or "
            f"check base/reset_choices (a reset choice restarts at reset_state={reset_state})."
        )
    if not uncensored.any():
        raise InputError(
            f"no increment can be counted: with observed increments from {lo} to {hi}, every "
            f"transition starts where part of that range would leave the states 0..{S - 1} "
            f"(censored). {_widest_choice(inc, choice, choices, resets)}"
        )
    n_used = int(uncensored.sum())
    if n_used < 0.5 * inc.size:
        warnings.warn(
            f"only {n_used} of {inc.size} observed transitions enter the increment pmf: the "
            f"others start within reach of the first or last state for increments from {lo} "
            f"to {hi}, so they are censored. {_widest_choice(inc, choice, choices, resets)}",
            OrthoCCPWarning, stacklevel=4,
        )
    pmf = np.bincount(inc[uncensored] - lo, minlength=hi - lo + 1).astype(np.float64)
    pmf /= pmf.sum()
    K = pmf.size
    indptr = np.arange(0, S * K + 1, K)
    data = np.tile(pmf, S)
    mats = []
    for j in range(len(choices)):
        # row s puts pmf[k] on state clip(b_j(s) + lo + k): K entries per row, in column
        # order; the clipped ones repeat a column and are summed (canonical CSR)
        cols = np.clip(bases[j][:, None] + lo + np.arange(K)[None, :], 0, S - 1)
        m = sparse.csr_matrix((data.copy(), cols.ravel(), indptr), shape=(S, S))
        m.sum_duplicates()
        mats.append(m)
    obs = {"unit": unit, "increment": inc, "uncensored": uncensored, "base": bases,
           "low": np.array([lo])}
    return TransitionMatrices(
        matrices=tuple(mats), method="increments", n_transitions=int(uncensored.sum()),
        increments=pmf, _obs=obs,
    )
