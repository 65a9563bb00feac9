"""The full Hotz--Miller inversion on a finite state space (sparse linear solve).

With logit shocks, the ex-ante value of following choice probabilities :math:`P` solves the
linear system

.. math::

    V = \\sum_j P_j \\circ \\big(u_j + \\gamma_E - \\ln P_j + \\beta F_j V\\big)
    \\iff (I - \\beta F^P)\\, V = \\sum_j P_j \\circ (u_j + \\gamma_E - \\ln P_j),
    \\qquad F^P = \\sum_j \\mathrm{diag}(P_j) F_j

(Hotz & Miller 1993; Aguirregabiria & Mira 2002, eq. 8). It needs no renewal or terminal
choice. At the model's own CCPs, :math:`V` is the value function, so the map
:math:`P \\mapsto \\Lambda(u + \\beta F V(P))` has the model's CCPs as its fixed point and a zero
Jacobian there (it is a policy-iteration step).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import sparse
from scipy.sparse.linalg import splu
from scipy.special import xlogy

from .._errors import EstimationError, InputError
from ..model import EULER_GAMMA

__all__ = ["hotz_miller_values"]


def as_sparse_transitions(transitions: Any, S: int, J: int) -> tuple[sparse.csr_matrix, ...]:
    """J sparse (S, S) matrices from a (J, S, S) array or a sequence of matrices."""
    if isinstance(transitions, np.ndarray):
        mats = tuple(sparse.csr_matrix(m) for m in transitions)
    elif isinstance(transitions, Sequence):
        mats = tuple(sparse.csr_matrix(m, dtype=np.float64) for m in transitions)
    else:
        raise InputError(
            f"transitions must be a (J, S, S) array or a sequence of J (S, S) matrices, got "
            f"{type(transitions).__name__}."
        )
    if len(mats) != J or any(m.shape != (S, S) for m in mats):
        raise InputError(
            f"transitions must hold J = {J} matrices of shape ({S}, {S}), got "
            f"{[m.shape for m in mats]}."
        )
    return mats


def entropy_term(ccp: np.ndarray) -> np.ndarray:
    """(S, J) :math:`P_j(\\gamma_E - \\ln P_j)`, with :math:`0 \\ln 0 = 0`."""
    return EULER_GAMMA * ccp - xlogy(ccp, ccp)


@dataclass(frozen=True, eq=False)
class InversionTerms:
    """The inversion written linearly in :math:`\\theta` (utilities :math:`Z\\theta`).

    ``value = Wz @ theta + We``; choice values ``v_j = Zt[:, j] @ theta + et[:, j]`` with
    :math:`\\tilde Z_j = Z_j + \\beta F_j W_z` and :math:`\\tilde e_j = \\beta F_j W_e`.
    """

    Wz: np.ndarray
    We: np.ndarray
    Zt: np.ndarray
    et: np.ndarray
    lu: Any


class PolicySystem:
    """The sparse matrix :math:`I - \\beta F^P` with its pattern fixed once.

    The union pattern of the identity and all :math:`F_j` is built in CSC order at
    construction; each :meth:`factor` call only refills the values of one matrix object (one
    ``bincount``) and runs ``scipy.sparse.linalg.splu``, so repeated solves at new CCPs stay
    cheap.
    """

    def __init__(self, mats: Sequence[sparse.csr_matrix], discount: float) -> None:
        S = mats[0].shape[0]
        self.S, self.discount = S, float(discount)
        rows, cols, vals, which = [np.arange(S)], [np.arange(S)], [np.zeros(S)], [np.full(S, -1)]
        for j, m in enumerate(mats):
            m = sparse.csr_matrix(m)  # no copy for a CSR matrix
            rows.append(np.repeat(np.arange(S), np.diff(m.indptr)))
            cols.append(m.indices.astype(np.int64))
            vals.append(m.data.astype(np.float64))
            which.append(np.full(m.indices.size, j))
        r, c_, self._vals, self._which = map(np.concatenate, (rows, cols, vals, which))
        key = c_ * S + r
        union, self._pos = np.unique(key, return_inverse=True)
        self._rows_all = r
        self.indices = (union % S).astype(np.int32)
        self.indptr = np.searchsorted(union // S, np.arange(S + 1)).astype(np.int32)
        self._diag = np.searchsorted(union, np.arange(S) * S + np.arange(S))
        self._nnz = union.size
        self._entries = self._which >= 0
        # one matrix object whose values each factor() call overwrites (its pattern is fixed)
        self._A = sparse.csc_matrix(
            (np.zeros(self._nnz), self.indices, self.indptr), shape=(S, S))

    def factor(self, ccp: np.ndarray) -> Any:
        """Sparse LU of :math:`I - \\beta \\sum_j \\mathrm{diag}(P_j) F_j` at ``ccp``."""
        e = self._entries
        w = ccp[self._rows_all[e], self._which[e]] * self._vals[e]
        data = -self.discount * np.bincount(self._pos[e], weights=w, minlength=self._nnz)
        data[self._diag] += 1.0
        A = self._A
        A.data[:] = data  # splu copies the values into its factors
        try:
            return splu(A)
        except RuntimeError as exc:
            raise EstimationError(
                f"I - beta F^P is singular ({exc}); with discount < 1 and stochastic "
                f"transitions this indicates transition rows that do not sum to one."
            ) from exc


def inversion_terms(
    ccp: np.ndarray,
    design: np.ndarray,
    mats: Sequence[sparse.csr_matrix],
    discount: float,
    system: PolicySystem | None = None,
) -> InversionTerms:
    """Solve the inversion for the design's columns and the entropy term at once."""
    S, J, p = design.shape
    lu = (system or PolicySystem(mats, discount)).factor(ccp)
    rhs = np.empty((S, p + 1))
    rhs[:, :p] = np.einsum("sj,sjk->sk", ccp, design)
    rhs[:, p] = entropy_term(ccp).sum(axis=1)
    W = lu.solve(rhs)
    FW = np.stack([m @ W for m in mats], axis=1)  # (S, J, p + 1)
    Zt = design + discount * FW[:, :, :p]
    et = discount * FW[:, :, p]
    return InversionTerms(Wz=W[:, :p], We=W[:, p], Zt=Zt, et=et, lu=lu)


def hotz_miller_values(
    ccp: np.ndarray,
    utility: np.ndarray,
    transitions: Any,
    *,
    discount: float,
) -> np.ndarray:
    """Ex-ante values implied by choice probabilities (full Hotz--Miller inversion).

    Parameters
    ----------
    ccp : numpy.ndarray
        (S, J) choice probabilities; rows sum to one (zeros allowed).
    utility : numpy.ndarray
        (S, J) flow utilities :math:`u_j(s)` without the shock.
    transitions : numpy.ndarray or sequence
        (J, S, S) array or J matrices (dense or ``scipy.sparse``), :math:`F_j(s' \\mid s)`.
    discount : float
        :math:`\\beta \\in [0, 1)`.

    Returns
    -------
    numpy.ndarray
        (S,) :math:`V` solving :math:`(I - \\beta F^P) V = \\sum_j P_j (u_j + \\gamma_E - \\ln P_j)`.

    Notes
    -----
    One sparse LU factorisation (``scipy.sparse.linalg.splu``) of :math:`I - \\beta F^P`.
    Any choice set works: no renewal or terminal choice is needed. At the CCPs of the
    model's solution the result is its value function (Hotz & Miller 1993, Proposition 1).

    References
    ----------
    Hotz, V. J. and Miller, R. A. (1993). Conditional choice probabilities and the
    estimation of dynamic models. Review of Economic Studies 60(3), 497--529.
    Aguirregabiria, V. and Mira, P. (2002). Swapping the nested fixed point algorithm: a
    class of estimators for discrete Markov decision models. Econometrica 70(4), 1519--1543.

    Examples
    --------
    >>> import numpy as np
    >>> F = np.array([[[0.5, 0.5], [0.0, 1.0]], [[1.0, 0.0], [1.0, 0.0]]])
    >>> V = hotz_miller_values(np.full((2, 2), 0.5), np.zeros((2, 2)), F, discount=0.9)
    >>> np.round(V, 4).tolist()  # (gamma_E + ln 2) / (1 - 0.9) in every state
    [12.7036, 12.7036]
    """
    ccp = np.asarray(ccp, dtype=np.float64)
    utility = np.asarray(utility, dtype=np.float64)
    if ccp.ndim != 2 or utility.shape != ccp.shape:
        raise InputError(
            f"ccp and utility must both have shape (S, J), got {ccp.shape} and {utility.shape}."
        )
    if (ccp < 0).any() or np.max(np.abs(ccp.sum(axis=1) - 1.0)) > 1e-9:
        raise InputError("ccp rows must be non-negative and sum to one.")
    beta = float(discount)
    if not 0.0 <= beta < 1.0:
        raise InputError(f"discount must be in [0, 1), got {discount!r}.")
    S, J = ccp.shape
    mats = as_sparse_transitions(transitions, S, J)
    lu = PolicySystem(mats, beta).factor(ccp)
    rhs = (ccp * utility).sum(axis=1) + entropy_term(ccp).sum(axis=1)
    return np.asarray(lu.solve(rhs))
