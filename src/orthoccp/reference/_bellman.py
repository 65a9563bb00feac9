"""Inner loop of the nested fixed point: the logit Bellman equation on a finite state space.

Notation (S states, J choices, p parameters):

* ``utility[s, j]`` -- flow utility :math:`u_j(s)` without the shock;
* ``transitions[j, s, s']`` -- :math:`F_j(s' \\mid s)`, each row sums to one;
* ``choice_values[s, j]`` -- :math:`v_j(s) = u_j(s) + \\beta \\sum_{s'} F_j(s' \\mid s) V(s')`;
* ``value[s]`` -- the ex-ante (integrated) value
  :math:`V(s) = \\ln \\sum_j \\exp v_j(s) + \\gamma_E`.

The solve itself is :func:`orthoccp.dp.solve_values` (the one Bellman solver, shared with the
simulators); this module supplies the dense choice values and the Newton matrix
:math:`I - \\beta F^P`, :math:`F^P = \\sum_j \\mathrm{diag}(P_j) F_j`, and the derivatives of the
solution in the parameters.
"""

from __future__ import annotations

from contextlib import AbstractContextManager, nullcontext
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.linalg import lu_factor, lu_solve
from threadpoolctl import threadpool_limits

from ..dp import logsumexp, solve_values
from ..model import EULER_GAMMA

__all__ = ["BellmanSolution", "bellman_operator", "solve_bellman", "value_derivative"]


@dataclass(frozen=True, eq=False)
class BellmanSolution:
    """A solved Bellman equation.

    Attributes
    ----------
    value : numpy.ndarray
        (S,) ex-ante value :math:`V`.
    choice_values : numpy.ndarray
        (S, J) choice-specific values :math:`v_j`.
    ccp : numpy.ndarray
        (S, J) conditional choice probabilities
        :math:`P_j = \\exp v_j / \\sum_k \\exp v_k`.
    residual : float
        :math:`\\lVert T(V) - V \\rVert_\\infty` at the returned :math:`V`.
    contraction_steps : int
        Successive-approximation steps taken.
    newton_steps : int
        Newton--Kantorovich steps taken.
    """

    value: np.ndarray
    choice_values: np.ndarray
    ccp: np.ndarray
    residual: float
    contraction_steps: int
    newton_steps: int

    @property
    def log_ccp(self) -> np.ndarray:
        """(S, J) :math:`\\ln P_j = v_j - \\ln\\sum_k \\exp v_k`, computed without underflow."""
        return self.choice_values - logsumexp(self.choice_values)[:, None]


def blas_limit(threads: int | None) -> AbstractContextManager[Any]:
    """Context limiting BLAS to ``threads`` threads (None: leave the setting alone).

    The solves here are small dense systems (a few hundred states): one thread is fastest, and
    several threads slowed them about tenfold on a 2-core machine shared with other processes.
    """
    if threads is None:
        return nullcontext()
    return threadpool_limits(limits=int(threads), user_api="blas")


def _check_inputs(utility: np.ndarray, transitions: np.ndarray, discount: float) -> None:
    if utility.ndim != 2:
        raise ValueError(f"utility must have shape (S, J), got {utility.shape}.")
    S, J = utility.shape
    if transitions.shape != (J, S, S):
        raise ValueError(
            f"transitions must have shape (J, S, S) = {(J, S, S)} to match utility "
            f"{utility.shape}, got {transitions.shape}."
        )
    if not (0.0 <= discount < 1.0):
        raise ValueError(f"discount must be in [0, 1), got {discount!r}.")
    if not np.all(np.isfinite(utility)):
        raise ValueError("utility has non-finite entries.")


def bellman_operator(
    value: np.ndarray, utility: np.ndarray, transitions: np.ndarray, discount: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """One application of the logit Bellman operator.

    Parameters
    ----------
    value : numpy.ndarray
        (S,) current guess :math:`V`.
    utility : numpy.ndarray
        (S, J) flow utilities.
    transitions : numpy.ndarray
        (J, S, S) row-stochastic transition matrices.
    discount : float
        :math:`\\beta`.

    Returns
    -------
    TV : numpy.ndarray
        (S,) :math:`T(V)(s) = \\ln \\sum_j \\exp\\{u_j(s) + \\beta F_j V(s)\\} + \\gamma_E`.
    choice_values : numpy.ndarray
        (S, J) the :math:`v_j` inside the log-sum.
    ccp : numpy.ndarray
        (S, J) the logit probabilities of ``choice_values``.
    """
    v = utility + discount * (transitions @ value).T
    m = v.max(axis=1, keepdims=True)
    e = np.exp(v - m)
    tot = e.sum(axis=1, keepdims=True)
    TV = m[:, 0] + np.log(tot[:, 0]) + EULER_GAMMA
    return TV, v, e / tot


def _newton_matrix(ccp: np.ndarray, transitions: np.ndarray, discount: float) -> np.ndarray:
    """:math:`I - \\beta \\sum_j \\mathrm{diag}(P_j) F_j`."""
    S = ccp.shape[0]
    FP = np.einsum("sj,jst->st", ccp, transitions)
    return np.eye(S) - discount * FP


def solve_bellman(
    utility: np.ndarray,
    transitions: np.ndarray,
    discount: float,
    *,
    value0: np.ndarray | None = None,
    tol: float = 1e-12,
    switch_tol: float = 5e-2,
    max_contraction: int = 20,
    max_newton: int = 50,
    blas_threads: int | None = 1,
) -> BellmanSolution:
    """Solve :math:`V = T(V)` to sup-norm ``tol`` (successive approximation, then Newton).

    Parameters
    ----------
    utility : numpy.ndarray
        (S, J) flow utilities :math:`u_j(s)`.
    transitions : numpy.ndarray
        (J, S, S) row-stochastic matrices :math:`F_j`.
    discount : float
        :math:`\\beta \\in [0, 1)`.
    value0 : numpy.ndarray, optional
        Starting guess (e.g. the previous outer iteration's solution); zeros by default.
    tol, switch_tol : float, default=1e-12, 5e-2
        As in :func:`orthoccp.dp.solve_values`: the sup-norm tolerance on
        :math:`T(V) - V`, and the change below which Newton steps take over.
    max_contraction : int, default=20
        Cap on the successive approximations before the first Newton step: one step costs
        about a seventh of a Newton step at S = 175 but gains only a factor :math:`\beta`.
    max_newton : int, default=50
        Cap on the Newton--Kantorovich steps.
    blas_threads : int or None, default=1
        BLAS threads during the solve; one is fastest for a few hundred states (several
        threads slowed the solve about tenfold on a shared 2-core machine). None leaves the
        setting alone.

    Returns
    -------
    BellmanSolution

    Raises
    ------
    EstimationError
        When the residual stays above ``tol`` (and above the rounding floor, see Notes).

    Notes
    -----
    The solve is :func:`orthoccp.dp.solve_values` (its Notes give the algorithm, the
    poly-algorithm of Rust 1987, 2000, and the rounding floor). With logit shocks
    :math:`T(V) = \\sum_j P_j (u_j + \\beta F_j V) - \\sum_j P_j \\ln P_j + \\gamma_E`, so each
    Newton step is a smoothed policy-iteration step. In the bus design the steps reach 1e-12
    in three to eight steps from a cold start.

    References
    ----------
    Rust, J. (1987). Optimal replacement of GMC bus engines: an empirical model of Harold
    Zurcher. Econometrica 55(5), 999--1033.

    Examples
    --------
    >>> import numpy as np
    >>> F = np.array([[[0.5, 0.5], [0.0, 1.0]], [[1.0, 0.0], [1.0, 0.0]]])
    >>> sol = solve_bellman(np.array([[0.0, -1.0], [-0.5, -1.0]]), F, 0.9)
    >>> bool(sol.residual < 1e-12), sol.ccp.shape
    (True, (2, 2))
    """
    utility = np.asarray(utility, dtype=np.float64)
    transitions = np.asarray(transitions, dtype=np.float64)
    discount = float(discount)
    _check_inputs(utility, transitions, discount)
    S = utility.shape[0]
    V0 = np.zeros(S) if value0 is None else np.array(value0, dtype=np.float64, copy=True)
    if V0.shape != (S,) or not np.all(np.isfinite(V0)):
        V0 = np.zeros(S)

    def choice_values(V: np.ndarray) -> np.ndarray:
        return (utility + discount * (transitions @ V[0]).T)[None]

    def newton_matrix(P: np.ndarray) -> np.ndarray:
        return _newton_matrix(P[0], transitions, discount)[None]

    with blas_limit(blas_threads):
        sol = solve_values(choice_values, newton_matrix, V0[None], tol=tol,
                           switch_tol=switch_tol, max_contraction=max_contraction,
                           max_newton=max_newton)
    V = sol.value[0]
    _, v, P = bellman_operator(V, utility, transitions, discount)
    return BellmanSolution(
        value=V, choice_values=v, ccp=P, residual=sol.residual,
        contraction_steps=sol.contraction_steps, newton_steps=sol.newton_steps,
    )


def value_derivative(
    solution: BellmanSolution, design: np.ndarray, transitions: np.ndarray, discount: float
) -> tuple[np.ndarray, np.ndarray]:
    """Derivatives of :math:`V` and :math:`v_j` in linear-in-parameter utilities.

    Parameters
    ----------
    solution : BellmanSolution
        The fixed point at the current parameters.
    design : numpy.ndarray
        (S, J, p) with :math:`u_j(s) = \\sum_k \\theta_k\\, Z_{jk}(s)`.
    transitions : numpy.ndarray
        (J, S, S).
    discount : float
        :math:`\\beta`.

    Returns
    -------
    dV : numpy.ndarray
        (S, p) :math:`\\partial V / \\partial \\theta'`.
    dv : numpy.ndarray
        (S, J, p) :math:`\\partial v_j / \\partial \\theta'`.

    Notes
    -----
    Differentiating :math:`V = T(V;\\theta)` (implicit function theorem) gives

    .. math::

        \\frac{\\partial V}{\\partial \\theta'}
        = (I - \\beta F^P)^{-1} \\sum_j \\mathrm{diag}(P_j)\\, Z_j, \\qquad
        \\frac{\\partial v_j}{\\partial \\theta'} = Z_j + \\beta F_j \\frac{\\partial V}{\\partial \\theta'},

    since :math:`\\partial T / \\partial V = \\beta F^P` and
    :math:`\\partial T / \\partial \\theta' = \\sum_j P_j Z_j` (Rust 1987, §4).
    """
    P = solution.ccp
    rhs = np.einsum("sj,sjk->sk", P, design)
    lu = lu_factor(_newton_matrix(P, transitions, discount))
    dV = lu_solve(lu, rhs)
    dv = design + discount * np.einsum("jst,tk->sjk", transitions, dV)
    return dV, dv
