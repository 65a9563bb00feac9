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

from .._errors import EstimationError

__all__ = ["PseudoFit", "cell_logit", "maximise_pseudo"]


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


def maximise_pseudo(
    Zt: np.ndarray,
    et: np.ndarray,
    counts: np.ndarray,
    theta0: np.ndarray,
    *,
    names: tuple[str, ...],
    maxiter: int = 200,
    xtol: float = 1e-11,
) -> PseudoFit:
    """Maximise the pseudo-likelihood by Newton's method with step halving.

    Parameters
    ----------
    Zt, et : numpy.ndarray
        (S, J, p) and (S, J) constructed regressors and offsets.
    counts : numpy.ndarray
        (S, J) choice counts.
    theta0 : numpy.ndarray
        Start (the previous iteration's estimate).
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
    seen = counts.sum(axis=1) > 0
    Zs, es, n = Zt[seen], et[seen], counts[seen]
    S_seen, J, p = Zs.shape
    ns, nflat = n.sum(axis=1), n.ravel()
    Zf = Zs.reshape(-1, p)
    theta = np.asarray(theta0, dtype=np.float64).copy()
    P, logp = cell_logit(Zs, es, theta)
    ll = float(nflat @ logp.ravel())
    it, step = 0, np.zeros_like(theta)
    for it in range(1, maxiter + 1):
        # Gradient and information from the flattened design (fewer array passes than
        # _scores): grad = Z'(n - n_s P), I = Z' diag(n_s P) Z - Zbar' diag(n_s) Zbar.
        w = ns[:, None] * P
        grad = Zf.T @ (nflat - w.ravel())
        Zbar = np.einsum("sj,sjp->sp", P, Zs)
        info = (Zf * w.reshape(-1, 1)).T @ Zf - (Zbar * ns[:, None]).T @ Zbar
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
            P_new, logp_new = cell_logit(Zs, es, theta + t * step)
            new = float(nflat @ logp_new.ravel())
            if new >= ll - 1e-12 * max(1.0, abs(ll)) or t < 1e-8:
                break
            t *= 0.5
        theta, P, ll = theta + t * step, P_new, new
        if not np.all(np.isfinite(theta)) or np.max(np.abs(theta)) > 1e8:
            raise EstimationError(
                f"the pseudo-likelihood has no finite maximiser (parameters run off: "
                f"{dict(zip(names, np.round(theta, 3)))}); some choice is perfectly predicted "
                f"by the states."
            )
    else:
        raise EstimationError(
            f"the pseudo-likelihood maximisation did not converge in {maxiter} Newton steps "
            f"(last step {np.max(np.abs(step)):.3g})."
        )
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
        scores=g, information=info, iterations=it,
    )
