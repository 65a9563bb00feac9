"""The one Bellman solver: the logit Bellman equation of a batch of units, solved exactly.

Both the simulators (:mod:`orthoccp.simulate`, one small Markov chain per unit, sparse) and
the full-solution reference (:mod:`orthoccp.reference`, one dense chain, inside the nested
fixed point) solve

.. math::

    V(s) = T(V)(s) = \\ln \\sum_j \\exp v_j(s) + \\gamma_E, \\qquad
    v_j(s) = u_j(s) + \\beta\\, E[V(s') \\mid s, j],

with :func:`solve_values`. They differ only in how they form the choice values
:math:`v_j` and the Newton matrix :math:`I - \\beta \\sum_j \\mathrm{diag}(P_j) F_j`, which they
pass in as functions of arrays shaped ``(N, S)`` (units by states).

The solver runs successive approximations (a contraction of modulus :math:`\\beta`) until the
change is small and then Newton--Kantorovich steps on :math:`\\Phi(V) = V - T(V)` with the exact
Fréchet derivative (Rust 1987, 2000: the "poly-algorithm"); with logit shocks one such step is
one step of smoothed policy iteration.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from ._errors import EstimationError
from .model import EULER_GAMMA

__all__ = ["EULER_GAMMA", "ValueSolution", "logsumexp", "solve_values"]


def logsumexp(v: np.ndarray) -> np.ndarray:
    """Numerically stable ``log(sum(exp(v)))`` over the last axis.

    Parameters
    ----------
    v : numpy.ndarray
        Array of shape ``(..., J)`` with finite entries.

    Returns
    -------
    numpy.ndarray
        Array of shape ``(...)``.
    """
    top = v.max(axis=-1)
    return top + np.log(np.exp(v - top[..., None]).sum(axis=-1))


@dataclass(frozen=True, eq=False)
class ValueSolution:
    """A solved Bellman equation of ``N`` units with ``S`` states and ``J`` choices.

    ``value`` is (N, S), ``choice_values`` (N, S, J) at ``value``; ``residual`` is the
    sup-norm of :math:`T(V) - V` over all units and states; ``contraction_steps`` and
    ``newton_steps`` count the successive approximations and Newton--Kantorovich steps.
    """

    value: np.ndarray
    choice_values: np.ndarray
    residual: float
    contraction_steps: int
    newton_steps: int

    @property
    def log_ccp(self) -> np.ndarray:
        """(N, S, J) :math:`\\ln P_j = v_j - \\ln\\sum_k \\exp v_k`, computed without underflow."""
        v = self.choice_values
        return v - logsumexp(v)[..., None]

    @property
    def ccp(self) -> np.ndarray:
        """(N, S, J) conditional choice probabilities."""
        return np.exp(self.log_ccp)


def _operator(
    choice_values: Callable[[np.ndarray], np.ndarray], V: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``T(V)``, the choice values and their logit probabilities."""
    v = choice_values(V)
    m = v.max(axis=-1, keepdims=True)
    e = np.exp(v - m)
    tot = e.sum(axis=-1, keepdims=True)
    return m[..., 0] + np.log(tot[..., 0]) + EULER_GAMMA, v, e / tot


def solve_values(
    choice_values: Callable[[np.ndarray], np.ndarray],
    newton_matrix: Callable[[np.ndarray], np.ndarray],
    start: np.ndarray,
    *,
    tol: float = 1e-12,
    switch_tol: float = 5e-2,
    max_contraction: int = 20,
    max_newton: int = 50,
) -> ValueSolution:
    """Solve :math:`V = T(V)` to sup-norm ``tol`` (successive approximation, then Newton).

    Parameters
    ----------
    choice_values : callable
        ``V (N, S) -> v (N, S, J)``: :math:`u_j + \\beta E[V(s') \\mid s, j]` (a terminal
        choice has no continuation term).
    newton_matrix : callable
        ``P (N, S, J) -> (N, S, S)``: :math:`I - \\beta \\sum_j \\mathrm{diag}(P_j) F_j`, the
        derivative of :math:`V - T(V)` (terminal choices contribute nothing).
    start : numpy.ndarray
        (N, S) starting values (e.g. the previous solve's; zeros for a cold start).
    tol : float, default=1e-12
        Stop when :math:`\\lVert T(V) - V \\rVert_\\infty < \\mathrm{tol}`.
    switch_tol : float, default=5e-2
        Successive approximations run until the sup-norm change falls below this (or for
        ``max_contraction`` steps), then Newton--Kantorovich steps take over.
    max_contraction : int, default=20
        Cap on the successive approximations before the first Newton step. With
        ``max_newton=0`` and ``switch_tol=0`` the solve is plain value iteration of at most
        this many steps.
    max_newton : int, default=50
        Cap on the Newton--Kantorovich steps.

    Returns
    -------
    ValueSolution

    Raises
    ------
    orthoccp.EstimationError
        When the residual stays above ``tol`` (and above the rounding floor, see Notes).

    Notes
    -----
    Successive approximation :math:`V_{k+1} = T(V_k)` converges linearly at rate
    :math:`\\beta`. The Newton--Kantorovich step solves

    .. math::

        (I - \\beta F^{P(V)})\\,\\Delta = T(V) - V, \\qquad V \\leftarrow V + \\Delta,

    and converges quadratically near the fixed point (Rust 1987, §4; Rust 2000, "NFXP
    manual"). With logit shocks the new :math:`V` is exactly the value of the logit policy
    :math:`P(V)`, so the steps are smoothed policy iteration: they improve monotonically after
    the first step and converge from any start. If rounding stops the residual just above
    ``tol``, the solution is accepted when the residual is below
    :math:`64\\,\\epsilon \\max |V|` (the floating point floor), and refused otherwise.
    The returned :math:`V` is :math:`T` of the last iterate, within
    :math:`\\beta\\,\\mathrm{tol} / (1 - \\beta)` of the fixed point.

    References
    ----------
    Rust, J. (1987). Optimal replacement of GMC bus engines: an empirical model of Harold
    Zurcher. Econometrica 55(5), 999--1033.
    """
    V = np.array(start, dtype=np.float64, copy=True)
    n_con = 0
    n_newton = 0
    TV, v, P = _operator(choice_values, V)
    resid = float(np.max(np.abs(TV - V)))
    while resid >= max(switch_tol, tol) and n_con < max_contraction:
        V = TV
        TV, v, P = _operator(choice_values, V)
        resid = float(np.max(np.abs(TV - V)))
        n_con += 1
    # Newton-Kantorovich steps. Each one is an exact smoothed policy-iteration step (evaluate
    # the logit policy of the current V), so the iterates improve monotonically after the
    # first step and converge from any start; the sup-norm residual may rise at a first step
    # taken far from the fixed point, so steps are not screened by it.
    best = (resid, V, TV)
    stalls = 0
    while resid >= tol and n_newton < max_newton:
        V = V + np.linalg.solve(newton_matrix(P), (TV - V)[..., None])[..., 0]
        TV, v, P = _operator(choice_values, V)
        resid_new = float(np.max(np.abs(TV - V)))
        n_newton += 1
        stalls = stalls + 1 if resid_new >= 0.5 * resid and resid_new < 1e-6 else 0
        resid = resid_new
        if resid < best[0]:
            best = (resid, V, TV)
        if stalls >= 2:
            break
    resid, V, TV = best
    if resid >= tol:
        # Rounding floor reached: contraction steps never increase the sup-norm error.
        for _ in range(50):
            V = TV
            TV, v, P = _operator(choice_values, V)
            resid = float(np.max(np.abs(TV - V)))
            n_con += 1
            if resid < tol:
                break
    if resid >= tol:
        # The returned V is within resid / (1 - beta) of the fixed point; accept rounding-level
        # shortfalls and refuse anything larger.
        scale = max(1.0, float(np.max(np.abs(V))))
        if resid > 64 * np.finfo(float).eps * scale:
            raise EstimationError(
                f"Bellman equation not solved: sup-norm residual {resid:.3g} after {n_con} "
                f"successive approximations and {n_newton} Newton-Kantorovich steps "
                f"(tolerance {tol:g})."
            )
    # One more successive approximation, which never moves V away from the fixed point
    # (it brings it a factor beta closer); report the choice values at the returned V.
    V = TV
    TV, v, _ = _operator(choice_values, V)
    return ValueSolution(
        value=V, choice_values=v, residual=float(np.max(np.abs(TV - V))),
        contraction_steps=n_con, newton_steps=n_newton,
    )
