"""The pseudo-likelihood on cell counts: a conditional logit with constructed regressors.

Given choice values :math:`\\tilde v_j(s) = \\tilde Z_j(s)'\\theta + \\tilde e_j(s)`, the
pseudo-log-likelihood of the choice counts :math:`n_{sj}` is

.. math::

    Q(\\theta) = \\sum_{s,j} n_{sj} \\ln \\Lambda_j(s;\\theta), \\qquad
    \\Lambda_j = \\exp \\tilde v_j / \\textstyle\\sum_k \\exp \\tilde v_k,

globally concave in :math:`\\theta`; Newton's method with step halving maximises it.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

from .._errors import EstimationError

__all__ = ["PseudoFit", "cell_logit", "grouped_logit_start", "maximise_pseudo", "newton_pseudo",
           "pseudo_fit"]


@dataclass(frozen=True, eq=False)
class PseudoFit:
    """A maximised pseudo-likelihood.

    Attributes
    ----------
    theta : numpy.ndarray
        (p,) maximiser.
    loglik : float
        :math:`Q(\\hat\\theta)`.
    ccp : numpy.ndarray
        (S, J) :math:`\\Lambda(\\hat\\theta)` at every state.
    scores : numpy.ndarray
        (S, J, p) :math:`g_j(s) = \\tilde Z_j - \\sum_k \\Lambda_k \\tilde Z_k`, the score of one
        observation of choice j in state s.
    information : numpy.ndarray
        (p, p) :math:`\\sum_s n_s \\sum_j \\Lambda_j g_j g_j'` (minus the Hessian of Q).
    iterations : int
        Newton steps.
    """

    theta: np.ndarray
    loglik: float
    ccp: np.ndarray
    scores: np.ndarray
    information: np.ndarray
    iterations: int


def cell_logit(Zt: np.ndarray, et: np.ndarray, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(S, J) logit probabilities and log-probabilities of :math:`\\tilde Z\\theta + \\tilde e`."""
    v = Zt @ theta + et
    m = v.max(axis=1, keepdims=True)
    logp = v - (m + np.log(np.exp(v - m).sum(axis=1, keepdims=True)))
    return np.exp(logp), logp


def _scores(Zt: np.ndarray, P: np.ndarray, n_s: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per-cell scores :math:`g_j` and the information :math:`\\sum_s n_s \\sum_j P_j g_j g_j'`."""
    p = Zt.shape[2]
    g = Zt - (P[:, :, None] * Zt).sum(axis=1, keepdims=True)
    root = (g * np.sqrt(n_s[:, None] * P)[:, :, None]).reshape(-1, p)
    return g, root.T @ root


class _Multinomial:
    """Q and its derivatives for J >= 2 choices (the general case)."""

    def __init__(self, Zs: np.ndarray, es: np.ndarray, n: np.ndarray) -> None:
        self.Zs, self.es = Zs, es
        self.p = Zs.shape[2]
        self.Zf = Zs.reshape(-1, self.p)
        self.nflat = n.ravel()
        self.ns = n.sum(axis=1)

    def loglik(self, theta: np.ndarray) -> tuple[float, np.ndarray]:
        P, logp = cell_logit(self.Zs, self.es, theta)
        return float(self.nflat @ logp.ravel()), P

    def derivatives(self, P: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        # grad = Z'(n - n_s P), I = Z' diag(n_s P) Z - Zbar' diag(n_s) Zbar
        w = self.ns[:, None] * P
        grad = self.Zf.T @ (self.nflat - w.ravel())
        Zbar = np.einsum("sj,sjp->sp", P, self.Zs)
        info = (self.Zf * w.reshape(-1, 1)).T @ self.Zf - (Zbar * self.ns[:, None]).T @ Zbar
        return grad, info


class _Binary:
    """Q and its derivatives for J = 2, as a binary logit of choice 1 on
    :math:`x = \\tilde Z_1 - \\tilde Z_0` with offset :math:`o = \\tilde e_1 - \\tilde e_0`:
    :math:`Q = \\sum_s n_{s1} \\eta_s - n_s \\ln(1 + e^{\\eta_s})`, :math:`\\eta = x'\\theta + o`.
    The same Q as :class:`_Multinomial` with fewer array passes."""

    def __init__(self, Zs: np.ndarray, es: np.ndarray, n: np.ndarray) -> None:
        self.X = Zs[:, 1, :] - Zs[:, 0, :]
        self.o = es[:, 1] - es[:, 0]
        self.y, self.ns = n[:, 1], n.sum(axis=1)

    def loglik(self, theta: np.ndarray) -> tuple[float, np.ndarray]:
        eta = self.X @ theta + self.o
        return float(self.y @ eta - self.ns @ np.logaddexp(0.0, eta)), eta

    def derivatives(self, eta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        p1 = special.expit(eta)
        grad = self.X.T @ (self.y - self.ns * p1)
        info = (self.X * (self.ns * p1 * (1.0 - p1))[:, None]).T @ self.X
        return grad, info


def grouped_logit_start(Zt: np.ndarray, et: np.ndarray, counts: np.ndarray) -> np.ndarray:
    """Minimum logit chi-square start (Berkson 1944): weighted least squares of the cells'
    empirical log-odds against choice 0 on the regressors' differences.

    .. math::

        \\ln\\frac{m_{sj}}{m_{s0}} - (\\tilde e_j - \\tilde e_0)(s)
        \\approx (\\tilde Z_j - \\tilde Z_0)(s)'\\theta, \\qquad
        w_{sj} = \\Big(\\frac{1}{m_{sj}} + \\frac{1}{m_{s0}}\\Big)^{-1},

    with :math:`m_{sj} = n_{sj} + \\bar P_j` (one pseudo-observation per cell, spread by the
    sample's choice shares :math:`\\bar P`, so empty cells stay finite; Haldane's 1/2 when a
    choice is never made) and :math:`w` the inverse of the log-odds' approximate variance.
    Only a start for Newton's method, which then maximises Q; NaN when the weighted normal
    equations are singular.
    """
    seen = counts.sum(axis=1) > 0
    shares = counts.sum(axis=0) / counts.sum()
    Z, e = Zt[seen], et[seen]
    n = counts[seen] + (shares if np.all(shares > 0) else 0.5)
    X = (Z[:, 1:, :] - Z[:, :1, :]).reshape(-1, Z.shape[2])
    y = (np.log(n[:, 1:] / n[:, :1]) - (e[:, 1:] - e[:, :1])).ravel()
    w = (1.0 / (1.0 / n[:, 1:] + 1.0 / n[:, :1])).ravel()
    Xw = X * w[:, None]
    try:
        return np.asarray(np.linalg.solve(Xw.T @ X, Xw.T @ y))
    except np.linalg.LinAlgError:
        return np.full(X.shape[1], np.nan)


def newton_pseudo(
    Zt: np.ndarray,
    et: np.ndarray,
    counts: np.ndarray,
    theta0: np.ndarray | None,
    *,
    names: tuple[str, ...],
    maxiter: int = 200,
    xtol: float = 1e-11,
    max_steps: int | None = None,
) -> tuple[np.ndarray, int]:
    """The maximiser of Q and the number of Newton steps (see :func:`maximise_pseudo`),
    without the scores and information at the estimate.

    With ``max_steps``, stop after that many (step-halved) Newton steps even short of
    convergence: NPL's inner loop, whose fixed point does not depend on it."""
    if max_steps is not None and max_steps < 1:
        raise ValueError(f"max_steps must be None or at least 1, got {max_steps!r}.")
    seen = counts.sum(axis=1) > 0
    Zs, es, n = Zt[seen], et[seen], counts[seen]
    q = _Binary(Zs, es, n) if Zs.shape[1] == 2 else _Multinomial(Zs, es, n)
    if theta0 is None:
        theta = np.zeros(Zt.shape[2])
        ll, state = q.loglik(theta)
        alt = grouped_logit_start(Zs, es, n)  # the observed cells: same start, no re-slicing
        if np.all(np.isfinite(alt)):
            ll_alt, state_alt = q.loglik(alt)
            if ll_alt > ll:
                theta, ll, state = alt, ll_alt, state_alt
    else:
        theta = np.asarray(theta0, dtype=np.float64).copy()
        ll, state = q.loglik(theta)
    it, step = 0, np.zeros_like(theta)
    for it in range(1, maxiter + 1):
        grad, info = q.derivatives(state)
        try:
            step = np.linalg.solve(info, grad)
        except np.linalg.LinAlgError as exc:
            raise EstimationError(
                f"the pseudo-likelihood information matrix is singular (condition number "
                f"{np.linalg.cond(info):.3g}); parameters {', '.join(names)} are not all "
                f"identified by the observed states and choices."
            ) from exc
        if np.all(np.abs(step) <= xtol * (1.0 + np.abs(theta))):
            theta = theta + step
            break
        t = 1.0
        while True:
            new, state_new = q.loglik(theta + t * step)
            if new >= ll - 1e-12 * max(1.0, abs(ll)) or t < 1e-8:
                break
            t *= 0.5
        theta, state, ll = theta + t * step, state_new, new
        if not np.abs(theta).max() <= 1e8:  # also catches NaN
            raise EstimationError(
                f"the pseudo-likelihood has no finite maximiser (parameters run off: "
                f"{dict(zip(names, np.round(theta, 3)))}); some choice is perfectly predicted "
                f"by the states."
            )
        if it == max_steps:
            break
    else:
        raise EstimationError(
            f"the pseudo-likelihood maximisation did not converge in {maxiter} Newton steps "
            f"(last step {np.max(np.abs(step)):.3g})."
        )
    return theta, it


def maximise_pseudo(
    Zt: np.ndarray,
    et: np.ndarray,
    counts: np.ndarray,
    theta0: np.ndarray | None,
    *,
    names: tuple[str, ...],
    maxiter: int = 200,
    xtol: float = 1e-11,
) -> PseudoFit:
    """Maximise the pseudo-likelihood by Newton's method with step halving.

    Newton starts from ``theta0``; without one, from zero or the minimum logit chi-square
    estimate (:func:`grouped_logit_start`), whichever has the larger Q. Q is globally concave,
    so the start changes only the number of steps, not the maximiser: far from the maximiser
    (rare choices) Newton from zero takes many short steps, and the chi-square start is
    usually closer.

    Parameters
    ----------
    Zt, et : numpy.ndarray
        (S, J, p) and (S, J) constructed regressors and offsets.
    counts : numpy.ndarray
        (S, J) choice counts.
    theta0 : numpy.ndarray or None
        Start (the previous iteration's estimate, or the user's); None: see above.
    names : tuple of str
        Parameter names (for error messages).
    maxiter : int, default=200
        Newton steps.
    xtol : float, default=1e-11
        Stop when every step component is below ``xtol * (1 + |theta|)``.

    Raises
    ------
    EstimationError
        When the information matrix is singular (parameters not identified) or the
        maximiser runs off (perfect prediction).
    """
    theta, it = newton_pseudo(Zt, et, counts, theta0, names=names, maxiter=maxiter, xtol=xtol)
    return pseudo_fit(Zt, et, counts, theta, names=names, iterations=it)


def pseudo_fit(
    Zt: np.ndarray,
    et: np.ndarray,
    counts: np.ndarray,
    theta: np.ndarray,
    *,
    names: tuple[str, ...],
    iterations: int,
) -> PseudoFit:
    """The CCPs, scores and information of Q at a maximiser ``theta`` (see
    :func:`maximise_pseudo`); raises EstimationError when the information is ill-conditioned."""
    P, logp = cell_logit(Zt, et, theta)
    g, info = _scores(Zt, P, counts.sum(axis=1))
    cond = np.linalg.cond(info)
    if not np.isfinite(cond) or cond > 1e14:
        raise EstimationError(
            f"the pseudo-likelihood information matrix is ill-conditioned at the estimate "
            f"(condition number {cond:.3g}); parameters {', '.join(names)} are not all "
            f"identified."
        )
    return PseudoFit(
        theta=theta, loglik=float(np.sum(counts * np.where(counts > 0, logp, 0.0))), ccp=P,
        scores=g, information=info, iterations=iterations,
    )
