"""GMM for user moments: Gauss–Newton solve, two-step optimal weighting, Hansen's J.

With :math:`\\bar g(\\theta) = n_g^{-1}\\sum_i s_i(\\theta)`, :math:`s_i = \\sum_{t\\in i}\\psi_t`
(sums by unit), the estimate minimises :math:`\\bar g' W \\bar g`: first with
:math:`W_1 = \\mathrm{diag}(\\hat\\Omega(\\theta_0))^{-1}` (each moment scaled by its spread at the
start, common practice for a first step), then with the optimal
:math:`W_2 = \\hat\\Omega(\\hat\\theta_1)^{-1}`, :math:`\\hat\\Omega = n_g^{-1}\\sum_i s_i s_i'`
(Hansen 1982, Econometrica 50). Just-identified systems solve :math:`\\bar g = 0` (W is then
irrelevant). :math:`J = n_g\\,\\bar g(\\hat\\theta)' W_2\\, \\bar g(\\hat\\theta)`, asymptotically
:math:`\\chi^2_{k-p}` under correct specification.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy import optimize, stats

from .._arrays import group_sums
from .._errors import EstimationError
from .._numeric import central_jacobian

__all__ = ["HansenJ", "GMMFit", "two_step_gmm", "cluster_sums", "anderson_step"]


@dataclass(frozen=True)
class HansenJ:
    """Hansen's test of the over-identifying restrictions.

    Attributes
    ----------
    statistic : float
        :math:`J = n_g \\bar g' \\hat\\Omega^{-1} \\bar g` (clustered by unit).
    df : int
        Number of moments minus number of parameters.
    pvalue : float
        :math:`P(\\chi^2_{df} > J)`.
    """

    statistic: float
    df: int
    pvalue: float

    def __str__(self) -> str:
        return f"J = {self.statistic:.3f} on {self.df} df (p = {self.pvalue:.3f})"


@dataclass(frozen=True)
class GMMFit:
    theta: np.ndarray
    weight: np.ndarray | None
    hansen: HansenJ | None
    iterations: int


def cluster_sums(values: np.ndarray, units: np.ndarray, n_units: int) -> np.ndarray:
    return group_sums(units, values, n_units)


def _minimise(
    gbar: Callable[[np.ndarray], np.ndarray], start: np.ndarray, W: np.ndarray, what: str
) -> tuple[np.ndarray, int]:
    L = np.linalg.cholesky(W)

    def resid(th: np.ndarray) -> np.ndarray:
        return L.T @ gbar(th)

    def jac(th: np.ndarray) -> np.ndarray:
        return L.T @ central_jacobian(gbar, th)

    try:
        sol = optimize.least_squares(resid, start, jac=jac, method="lm", xtol=1e-13, ftol=1e-15,
                                     gtol=1e-15, max_nfev=500)
    except (FloatingPointError, np.linalg.LinAlgError) as exc:
        raise EstimationError(f"{what}: the solve failed ({exc}).") from exc
    G = jac(sol.x)
    cond = float(np.linalg.cond(G)) if np.all(np.isfinite(G)) else float("inf")
    if not np.all(np.isfinite(sol.x)) or not np.isfinite(cond) or cond > 1e12:
        raise EstimationError(
            f"{what}: the moment Jacobian is singular or ill-conditioned at the solution "
            f"(condition number {cond:.3g}, theta {np.round(sol.x, 6).tolist()}); a parameter is "
            f"(nearly) not identified by these moments."
        )
    if sol.status <= 0:
        raise EstimationError(
            f"{what} did not converge ({sol.message}; condition number {cond:.3g}, last "
            f"objective {2 * sol.cost:.3g})."
        )
    return sol.x, int(sol.nfev)


def two_step_gmm(
    gbar: Callable[[np.ndarray], np.ndarray],
    sums: Callable[[np.ndarray], np.ndarray],
    start: np.ndarray,
    *,
    what: str,
) -> GMMFit:
    """Solve the (possibly over-identified) moment system; see the module docstring."""
    k = gbar(start).size
    p = start.size
    if k == p:
        theta, it = _minimise(gbar, start, np.eye(k), what)
        g = gbar(theta)
        S = sums(theta)
        scale = np.sqrt((S**2).mean(axis=0)) / np.sqrt(S.shape[0])
        if np.any(np.abs(g) > 1e-6 * np.maximum(scale, 1e-12)):
            raise EstimationError(
                f"{what}: no root of the moment equations found (mean moment "
                f"{np.round(g, 8).tolist()} at theta {np.round(theta, 6).tolist()})."
            )
        return GMMFit(theta, None, None, it)
    S0 = sums(start)
    W1 = np.diag(1.0 / np.maximum((S0**2).mean(axis=0), 1e-300))
    theta1, it1 = _minimise(gbar, start, W1, f"{what} (first step)")
    S1 = sums(theta1)
    Omega = S1.T @ S1 / S1.shape[0]
    try:
        W2 = np.linalg.inv(Omega)
        np.linalg.cholesky(W2)
    except np.linalg.LinAlgError as exc:
        raise EstimationError(
            f"{what}: the moment covariance is singular (condition number "
            f"{np.linalg.cond(Omega):.3g}); two moments are (nearly) the same."
        ) from exc
    theta2, it2 = _minimise(gbar, theta1, W2, f"{what} (second step)")
    g = gbar(theta2)
    n_g = S1.shape[0]
    J = float(n_g * g @ W2 @ g)
    return GMMFit(theta2, W2, HansenJ(J, k - p, float(stats.chi2.sf(J, k - p))), it1 + it2)


def anderson_step(history: list[tuple[np.ndarray, np.ndarray]], *, memory: int) -> np.ndarray:
    """Next iterate of the fixed-point problem :math:`x = T(x)` by Anderson acceleration.

    Parameters
    ----------
    history : list of (x, T(x))
        Past iterates and their images, oldest first; the last one is the current iterate.
    memory : int
        Number of past differences used (Anderson's m).

    Returns
    -------
    numpy.ndarray
        :math:`x_{k+1} = T(x_k) - \\Delta G\\,\\gamma`, with
        :math:`\\gamma = \\arg\\min_\\gamma \\lVert f_k - \\Delta F\\gamma\\rVert`,
        :math:`f = T(x) - x`, :math:`\\Delta F`, :math:`\\Delta G` the differences of successive
        residuals and images. The plain update :math:`T(x_k)` is used while the history is
        too short, and instead of an accelerated point that is not finite or that moves
        farther than ten plain updates would.

    Notes
    -----
    Type-II Anderson mixing (Anderson 1965, J. ACM 12; Walker & Ni 2011, SIAM J. Numer.
    Anal. 49). For a map that is close to affine in a p-dimensional parameter, p + 1
    differences recover its fixed point in a few steps where the plain iteration contracts
    only geometrically.

    Examples
    --------
    >>> T = lambda x: 0.8 * x + 1.0          # fixed point 5, slow plain iteration
    >>> hist, x = [], np.zeros(1)
    >>> for _ in range(3):
    ...     hist.append((x, T(x)))
    ...     x = anderson_step(hist, memory=2)
    >>> np.round(x, 8)
    array([5.])
    """
    x_k, g_k = history[-1]
    if len(history) < 2 or memory < 1:
        return g_k
    past = history[-(memory + 1):]
    X = np.array([h[0] for h in past])
    G = np.array([h[1] for h in past])
    F = G - X
    dF, dG = np.diff(F, axis=0), np.diff(G, axis=0)
    gamma = np.linalg.lstsq(dF.T, F[-1], rcond=None)[0]
    x_new = g_k - dG.T @ gamma
    plain = g_k - x_k
    if not np.all(np.isfinite(x_new)) or np.linalg.norm(x_new - x_k) > 10 * np.linalg.norm(plain) + 1e-300:
        return g_k
    return x_new
