r"""Markov perfect equilibria of an :class:`~orthoccp.games.EntryGame`, solved exactly.

Given every firm's conditional choice probabilities :math:`P` (S x N), firm i's value under
P is linear in :math:`\theta` (Hotz & Miller 1993; Aguirregabiria & Mira 2007, section 3):

.. math::

    V_i^P = (I - \beta F^P)^{-1}\big[P_i \circ \bar z_i \theta + e_i(P)\big],
    \qquad e_i = \gamma_E - P_i \ln P_i - (1 - P_i)\ln(1 - P_i),

where :math:`\bar z_i(x)` is firm i's expected payoff regressor of being active when the
rivals act by their CCPs (:math:`E[\ln(1 + N_{-i}) \mid x]` under :math:`P_{-i}`) and
:math:`F^P` is the state transition when everybody does. The value difference of being
active is then :math:`\tilde z_i \theta + \tilde e_i` with
:math:`\tilde z_i = \bar z_i + \beta (F_i^1 - F_i^0) W_{z,i}` and
:math:`\tilde e_i = \beta (F_i^1 - F_i^0) W_{e,i}`, :math:`F_i^d` the transition when i
takes d and the rivals act by :math:`P_{-i}`. The best-response mapping
:math:`\Psi(P) = \Lambda(\tilde z \theta + \tilde e)` has the equilibria as its fixed points
(Aguirregabiria & Mira 2007, Representation Lemma).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
from scipy import linalg, optimize
from scipy.sparse import linalg as sparse_linalg

from .._errors import EstimationError, InputError
from ..dp import logsumexp
from ..model import EULER_GAMMA
from ._design import EntryGame

__all__ = ["Equilibrium", "ValueTerms", "best_response", "psi_radius", "solve_equilibrium", "value_terms"]

_EPS = 1e-300


@dataclass(frozen=True, eq=False)
class ValueTerms:
    r"""Firm by firm, the value difference of being active as a linear function of
    :math:`\theta` under given CCPs: :math:`\tilde z_i \theta + \tilde e_i`.

    Attributes
    ----------
    zt : numpy.ndarray
        (N, S, K) :math:`\tilde z_i`.
    et : numpy.ndarray
        (N, S) :math:`\tilde e_i`.
    zbar : numpy.ndarray
        (N, S, K) :math:`\bar z_i`, the expected flow regressors of being active.
    transition : numpy.ndarray
        (S, S) :math:`F^P`.
    own : numpy.ndarray
        (N, 2, S, S) :math:`F_i^0, F_i^1`.
    """

    zt: np.ndarray
    et: np.ndarray
    zbar: np.ndarray
    transition: np.ndarray = field(repr=False)
    own: np.ndarray = field(repr=False)


def _profiles(n: int) -> np.ndarray:
    """(2^N, N) the action profiles, profile a's bit i being firm i's action."""
    a = np.arange(2 ** n)
    return (a[:, None] >> np.arange(n)[None, :]) & 1


def value_terms(game: EntryGame, ccp: np.ndarray) -> ValueTerms:
    """:class:`ValueTerms` of ``game`` under the CCPs ``ccp`` (S x N, the probability of
    being active)."""
    S, N, L = game.n_states, game.n_firms, game.size_levels
    P = np.asarray(ccp, dtype=np.float64)
    if P.shape != (S, N) or not np.all((P > 0) & (P < 1)):
        raise InputError(f"ccp must be an ({S}, {N}) array of probabilities in (0, 1).")
    B = _profiles(N)
    A = B.shape[0]
    level, last = game.state_parts()
    size_index = np.arange(S) // A
    # factor[j]: (S, A) the probability that firm j takes its action in profile a
    factor = np.where(B.T[:, None, :] == 1, P.T[:, :, None], 1.0 - P.T[:, :, None])
    everyone = np.prod(factor, axis=0)
    Fs = game.size_transition[size_index]  # (S, L) next size given the state's size
    transition = (Fs[:, :, None] * everyone[:, None, :]).reshape(S, L * A)
    K = N + 3
    zbar = np.zeros((N, S, K))
    own = np.zeros((N, 2, S, S))
    for i in range(N):
        rivals = np.prod(np.delete(factor, i, axis=0), axis=0)  # (S, A), free of bit i
        n_rivals = B.sum(axis=1) - B[:, i]
        with_i = B[:, i] == 1
        zbar[i, :, i] = 1.0
        zbar[i, :, N] = level
        zbar[i, :, N + 1] = -(1.0 - last[:, i])
        zbar[i, :, N + 2] = -(rivals[:, with_i] * np.log1p(n_rivals[with_i])).sum(axis=1)
        for d in (0, 1):
            q = rivals * (B[:, i] == d)[None, :]
            own[i, d] = (Fs[:, :, None] * q[:, None, :]).reshape(S, L * A)
    lu = linalg.lu_factor(np.eye(S) - game.discount * transition)
    entropy = EULER_GAMMA - P * np.log(P) - (1.0 - P) * np.log(1.0 - P)  # (S, N)
    rhs = np.concatenate([P.T[:, :, None] * zbar, entropy.T[:, :, None]], axis=2)  # (N, S, K+1)
    W = linalg.lu_solve(lu, rhs.transpose(1, 0, 2).reshape(S, N * (K + 1)))
    W = W.reshape(S, N, K + 1).transpose(1, 0, 2)
    delta = own[:, 1] - own[:, 0]  # (N, S, S)
    cont = game.discount * np.einsum("nst,ntk->nsk", delta, W)
    return ValueTerms(zt=zbar + cont[:, :, :K], et=cont[:, :, K], zbar=zbar,
                      transition=transition, own=own)


def best_response(game: EntryGame, ccp: np.ndarray, theta: np.ndarray | None = None) -> np.ndarray:
    r""":math:`\Psi(P)`: every firm's optimal CCP when all firms' continuation values are
    those of ``ccp`` (the game's own parameters unless ``theta`` is given)."""
    th = game.theta if theta is None else np.asarray(theta, dtype=np.float64)
    vt = value_terms(game, ccp)
    v = np.einsum("nsk,k->sn", vt.zt, th) + vt.et.T
    return 1.0 / (1.0 + np.exp(-v))


@dataclass(frozen=True, eq=False)
class Equilibrium:
    """A Markov perfect equilibrium of an entry game.

    Attributes
    ----------
    game : EntryGame
    ccp : numpy.ndarray
        (S, N) each firm's probability of being active in each state.
    values : numpy.ndarray
        (S, N) each firm's ex-ante value function.
    method : str
        How it was found (``"iteration"``, ``"damped iteration"`` or ``"newton"``).
    iterations : int
        Best-response iterations (or Newton steps).
    best_response_residual : float
        :math:`\\max |\\Psi(P) - P|`.
    bellman_residual : float
        :math:`\\max |V_i - T_i(V_i)|`, :math:`T_i` firm i's Bellman operator with the rivals
        acting by :math:`P_{-i}`.
    """

    game: EntryGame
    ccp: np.ndarray = field(repr=False)
    values: np.ndarray = field(repr=False)
    method: str
    iterations: int
    best_response_residual: float
    bellman_residual: float

    @cached_property
    def jacobian(self) -> np.ndarray:
        """(SN, SN) :math:`\\partial \\Psi / \\partial P` at the equilibrium (central
        differences, entries of P in column-major firm order)."""
        P = self.ccp
        S, N = P.shape
        J = np.empty((S * N, S * N))
        for c in range(S * N):
            s, n = c % S, c // S
            h = 1e-6 * min(P[s, n], 1.0 - P[s, n], 0.01) / 0.01
            up, down = P.copy(), P.copy()
            up[s, n] += h
            down[s, n] -= h
            J[:, c] = (best_response(self.game, up) - best_response(self.game, down)).T.ravel() / (2 * h)
        return J

    @cached_property
    def spectral_radius(self) -> float:
        """Largest modulus of an eigenvalue of :attr:`jacobian` (:func:`psi_radius`): below 1
        the equilibrium is stable under best-response iteration, and NPL can converge to it
        (Kasahara & Shimotsu 2012, Econometrica 80)."""
        return psi_radius(self.game, self.ccp)

    def stationary(self) -> np.ndarray:
        """(S,) the stationary distribution of the state under the equilibrium."""
        F = value_terms(self.game, self.ccp).transition
        w, v = np.linalg.eig(F.T)
        k = int(np.argmin(np.abs(w - 1.0)))
        pi = np.abs(np.real(v[:, k]))
        return pi / pi.sum()


def psi_radius(game: EntryGame, ccp: np.ndarray, theta: np.ndarray | None = None) -> float:
    r"""Spectral radius of :math:`\partial\Psi(\theta, P)/\partial P` at ``ccp``.

    Found by Arnoldi iteration (scipy's ``eigs``) on Jacobian-vector products (central
    differences of :func:`best_response`), without forming the (SN, SN) Jacobian.
    """
    P = np.asarray(ccp, dtype=np.float64)
    S, N = P.shape
    h = 1e-6 * float(min(P.min(), (1 - P).min(), 0.01)) / 0.01

    def matvec(v: np.ndarray) -> np.ndarray:
        d = np.real(np.asarray(v)).reshape(N, S).T
        up = best_response(game, P + h * d, theta)
        down = best_response(game, P - h * d, theta)
        return ((up - down).T.ravel() / (2 * h)).astype(np.float64)

    op = sparse_linalg.LinearOperator((S * N, S * N), matvec=matvec, dtype=np.float64)
    values = sparse_linalg.eigs(op, k=1, which="LM", tol=1e-8, v0=np.ones(S * N),
                                return_eigenvectors=False)
    return float(np.max(np.abs(values)))


def _residuals(game: EntryGame, P: np.ndarray) -> tuple[float, float, np.ndarray]:
    vt = value_terms(game, P)
    th = game.theta
    br = float(np.max(np.abs(best_response(game, P) - P)))
    values = np.empty_like(P)
    bellman = 0.0
    for i in range(game.n_firms):
        # V_i from the valuation, then one application of firm i's Bellman operator
        flow = P[:, i] * (vt.zbar[i] @ th) + EULER_GAMMA - P[:, i] * np.log(P[:, i]) \
            - (1 - P[:, i]) * np.log(1 - P[:, i])
        V = np.linalg.solve(np.eye(P.shape[0]) - game.discount * vt.transition, flow)
        v = np.stack([game.discount * vt.own[i, 0] @ V,
                      vt.zbar[i] @ th + game.discount * vt.own[i, 1] @ V], axis=1)
        bellman = max(bellman, float(np.max(np.abs(logsumexp(v) + EULER_GAMMA - V))))
        values[:, i] = V
    return br, bellman, values


def solve_equilibrium(
    game: EntryGame,
    *,
    start: np.ndarray | float = 0.5,
    damping: float = 1.0,
    tol: float = 1e-12,
    max_iterations: int = 20_000,
    newton: bool = True,
) -> Equilibrium:
    r"""A Markov perfect equilibrium by best-response iteration, then Newton if needed.

    Parameters
    ----------
    game : EntryGame
    start : float or numpy.ndarray, default=0.5
        Starting CCPs (a number for every firm and state, or an (S, N) array).
    damping : float, default=1.0
        :math:`\lambda` in :math:`P \leftarrow (1 - \lambda) P + \lambda \Psi(P)`.
    tol : float, default=1e-12
        Stop when :math:`\max |\Psi(P) - P| <` ``tol``.
    max_iterations : int, default=20000
        Cap on the best-response iterations.
    newton : bool, default=True
        When the iteration does not converge (an equilibrium unstable under best responses),
        solve :math:`\mathrm{logit}\,P = \mathrm{logit}\,\Psi(P)` by Newton's method with a
        numerical Jacobian from the last iterate.

    Returns
    -------
    Equilibrium
        With its best-response and Bellman residuals.

    Raises
    ------
    EstimationError
        When neither the iteration nor Newton's method reaches ``tol``.

    Notes
    -----
    An equilibrium is a fixed point of :math:`\Psi` (Aguirregabiria & Mira 2007,
    Representation Lemma). Several starts that end apart reveal several equilibria.
    """
    S, N = game.n_states, game.n_firms
    P = np.broadcast_to(np.asarray(start, dtype=np.float64), (S, N)).copy()
    if not np.all((P > 0) & (P < 1)):
        raise InputError("start must hold probabilities in (0, 1).")
    if not 0 < damping <= 1:
        raise InputError(f"damping must be in (0, 1], got {damping!r}.")
    method = "iteration" if damping == 1 else "damped iteration"
    change = np.inf
    it = 0
    for it in range(1, max_iterations + 1):
        new = best_response(game, P)
        change = float(np.max(np.abs(new - P)))
        P = (1.0 - damping) * P + damping * new
        if change < tol or not np.isfinite(change):
            break
    if not change < tol and newton:
        P = _newton(game, P if np.all(np.isfinite(P)) else np.full((S, N), 0.5), tol)
        method = "newton"
    br, bellman, values = _residuals(game, P)
    if not br < max(tol, 1e-10):
        raise EstimationError(
            f"no equilibrium of {game.name} found: the best-response residual is {br:.3g} "
            f"after {it} iterations{' and Newton steps' if newton else ''}; try damping < 1 "
            f"or another start."
        )
    return Equilibrium(game=game, ccp=P, values=values, method=method, iterations=it,
                       best_response_residual=br, bellman_residual=bellman)


def _newton(game: EntryGame, P: np.ndarray, tol: float) -> np.ndarray:
    """Newton's method on y - logit(Psi(Lambda(y))) = 0, y = logit(P), with the Jacobian
    applied by finite differences inside a Krylov solver (scipy's ``newton_krylov``)."""
    S, N = P.shape

    def residual(y: np.ndarray) -> np.ndarray:
        Q = best_response(game, 1.0 / (1.0 + np.exp(-y.reshape(N, S).T)))
        return y - (np.log(Q) - np.log1p(-Q)).T.ravel()

    y0 = (np.log(P) - np.log1p(-P)).T.ravel()
    try:
        y = optimize.newton_krylov(residual, y0, f_tol=tol * 1e-2, maxiter=100)
    except optimize.NoConvergence as exc:
        y = np.asarray(exc.args[0]) if exc.args else y0
    return 1.0 / (1.0 + np.exp(-np.asarray(y).reshape(N, S).T))
