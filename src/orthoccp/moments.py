"""Identifying moment and its Neyman-orthogonal correction (METHOD §3–§4).

With the nuisances plugged in, every value difference is linear in the parameters,

.. math::

    w_j(x) = X_j(x)'\\theta + o_j(x), \\qquad w_R = 0,

renewal: :math:`X_j = z_j - z_R + \\beta(\\mu^z_j - \\mu^z_R)`,
:math:`o_j = -\\beta(\\mu^\\ell_j - \\mu^\\ell_R)`;
terminal: :math:`X_j = z_j - z_R + \\beta\\mu^z_j`,
:math:`o_j = \\beta(\\gamma_E - \\mu^\\ell_j)` (a constant in :math:`z_R` has :math:`\\mu = 1`).

The pseudo-likelihood score is :math:`m = \\sum_{j \\ne R}(1\\{a = j\\} - \\Lambda_j) X_j`
(Hotz & Miller 1993; Aguirregabiria & Mira 2002). The locally robust moment
(Chernozhukov, Escanciano, Ichimura, Newey & Robins 2022) is :math:`\\psi = m + \\phi_\\mu + \\phi_P`
with the Riesz weight of the row's own choice

.. math::

    \\alpha(x, a) = -(X_a - \\bar X)\\, g(\\theta)', \\quad \\bar X = \\sum_k \\Lambda_k X_k,
    \\quad g(\\theta) = \\beta\\,(\\theta_{z_R}, -1),

(:math:`X_R = 0`), and

.. math::

    \\phi_\\mu = \\alpha\\,(q(x_{t+1}) - \\mu_{a_t}(x_t)), \\qquad
    \\phi_P = \\beta (X_a - \\bar X)\\,
        \\frac{1\\{a_{t+1} = R\\} - P_R(x_{t+1})}{P_R(x_{t+1})}.

Rows that need no next row (terminal anchor chosen) have :math:`\\phi = 0`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.special import logsumexp

from .model import EULER_GAMMA, BoundModel
from .nuisance import Nuisances

__all__ = ["MomentSystem", "build_moment_system"]


@dataclass(frozen=True, eq=False)
class MomentSystem:
    """Moment rows with their constructed regressors and correction ingredients.

    Attributes
    ----------
    X : numpy.ndarray
        (n, J, p) constructed regressors (zero for the anchor).
    offset : numpy.ndarray
        (n, J) offsets (zero for the anchor).
    chosen : numpy.ndarray
        (n,) choice code of each moment row.
    units : numpy.ndarray
        (n,) unit code of each moment row (cluster).
    corrected : numpy.ndarray
        (n,) True where the correction terms apply (a next row is used).
    target_resid : numpy.ndarray
        (n, d) :math:`q(x_{t+1}) - \\mu_{a_t}(x_t)` (0 where not corrected).
    ccp_score : numpy.ndarray
        (n,) :math:`(1\\{a_{t+1} = R\\} - P_R(x_{t+1})) / P_R(x_{t+1})` (0 where not corrected).
    zR_params : numpy.ndarray
        Parameter indices of the z_R data-column targets.
    discount : float
        :math:`\\beta`.
    instruments : numpy.ndarray or None
        (n, J, p) instruments A_j replacing X_j in the moment (renewal-robust moments,
        METHOD §4b); None means A = X (the pseudo-likelihood score).
    anchor_branch : numpy.ndarray or None
        (p,) booleans: whether the correction is applied on rows that chose the anchor.
        False for moments orthogonal to the post-renewal value; None means all True.
    next_anchor_p : numpy.ndarray or None
        (n,) the first stage's :math:`P_R(x_{t+1})` where the correction applies (1 elsewhere),
        for :func:`orthoccp.interval_checks.unseen_variance`.
    correction_theta : numpy.ndarray or None
        Where the corrections' weights :math:`A_a - \\bar A(\\theta)` and :math:`g(\\theta)` are
        evaluated: None at the :math:`\\theta` given (the corrected moment
        :math:`m(\\theta) + \\phi(\\theta)`), or a fixed preliminary value :math:`\\tilde\\theta`
        (the plug-in solution; the moment :math:`m(\\theta) + \\phi(\\tilde\\theta)`, whose
        corrections are constants; ``correction_weights="plugin"`` of :func:`orthoccp.estimate`).
    """

    X: np.ndarray
    offset: np.ndarray
    chosen: np.ndarray
    units: np.ndarray
    corrected: np.ndarray
    target_resid: np.ndarray
    ccp_score: np.ndarray
    zR_params: np.ndarray
    discount: float
    anchor: int
    instruments: np.ndarray | None = None
    anchor_branch: np.ndarray | None = None
    next_anchor_p: np.ndarray | None = None
    correction_theta: np.ndarray | None = None

    @property
    def n_rows(self) -> int:
        return int(self.X.shape[0])

    @property
    def n_params(self) -> int:
        return int(self.X.shape[2])

    def index(self, theta: np.ndarray) -> np.ndarray:
        """Value differences :math:`w = X\\theta + o`, shape (n, J)."""
        return self.X @ theta + self.offset

    def probabilities(self, theta: np.ndarray) -> np.ndarray:
        """Model-implied choice probabilities :math:`\\Lambda(\\theta)`, shape (n, J)."""
        w = self.index(theta)
        return np.exp(w - logsumexp(w, axis=1, keepdims=True))

    def loglik(self, theta: np.ndarray) -> float:
        """Pseudo log-likelihood :math:`\\sum_i \\ln \\Lambda_{a_i}(\\theta)`."""
        w = self.index(theta)
        return float((w[np.arange(self.n_rows), self.chosen] - logsumexp(w, axis=1)).sum())

    @property
    def W(self) -> np.ndarray:
        """Instruments of the moment (the constructed regressors unless replaced)."""
        return self.X if self.instruments is None else self.instruments

    @staticmethod
    def _centre(lam: np.ndarray, A: np.ndarray) -> np.ndarray:
        abar = np.einsum("nj,njp->np", lam, A)
        return A - abar[:, None, :]

    def score(self, theta: np.ndarray) -> np.ndarray:
        """Identifying moment :math:`m = \\sum_j A_j (1\\{a = j\\} - \\Lambda_j)` per row, (n, p)."""
        lam = self.probabilities(theta)
        resid = -lam
        resid[np.arange(self.n_rows), self.chosen] += 1.0
        return np.einsum("nj,njp->np", resid, self.W)

    def jacobian(self, theta: np.ndarray) -> np.ndarray:
        """:math:`G = \\sum_i \\partial m_i / \\partial\\theta'`.

        :math:`-\\sum_i\\sum_j \\Lambda_j (A_j - \\bar A)(X_j - \\bar X)'`; negative semi-definite
        when A = X (the Hessian of the pseudo log-likelihood).
        """
        lam = self.probabilities(theta)
        CX = self._centre(lam, self.X)
        CW = CX if self.instruments is None else self._centre(lam, self.instruments)
        return -np.einsum("nj,njp,njq->pq", lam, CW, CX)

    def correction_weight(self, theta: np.ndarray) -> np.ndarray:
        r"""(n, p) :math:`A_a - \bar A` of each row's own choice, the weight of both
        corrections; zero on anchor rows for parameters without an anchor-branch correction.
        Evaluated at :attr:`correction_theta` when that is set."""
        if self.correction_theta is not None:
            theta = self.correction_theta
        lam = self.probabilities(theta)
        own = self._centre(lam, self.W)[np.arange(self.n_rows), self.chosen]
        if self.anchor_branch is not None and not self.anchor_branch.all():
            own[np.ix_(self.chosen == self.anchor, ~self.anchor_branch)] = 0.0
        return own

    def corrections(self, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Correction terms :math:`(\\phi_\\mu, \\phi_P)` per row, each (n, p)."""
        if self.discount == 0.0:
            z = np.zeros((self.n_rows, self.n_params))
            return z, z.copy()
        own = self.correction_weight(theta)
        if self.correction_theta is not None:
            theta = self.correction_theta
        g = self.discount * np.concatenate([theta[self.zR_params], [-1.0]])
        phi_mu = -own * (self.target_resid @ g)[:, None]
        phi_p = self.discount * own * self.ccp_score[:, None]
        return phi_mu, phi_p

    def components(self, theta: np.ndarray, *, debias: bool) -> dict[str, np.ndarray]:
        """Per-row moment pieces: ``m`` and, when debiased, ``phi_mu`` and ``phi_P``."""
        out = {"m": self.score(theta)}
        if debias:
            phi_mu, phi_p = self.corrections(theta)
            out["phi_mu"] = phi_mu
            out["phi_P"] = phi_p
        return out

    def moment(self, theta: np.ndarray, *, debias: bool) -> np.ndarray:
        """Per-row moment used for estimation (:math:`\\psi` or :math:`m`)."""
        parts = self.components(theta, debias=debias)
        return sum(parts.values())  # type: ignore[return-value]


def build_moment_system(
    bound: BoundModel, nuisances: Nuisances, rows: np.ndarray, corrected: np.ndarray
) -> MomentSystem:
    """Constructed regressors, offsets and correction ingredients at the moment rows.

    Parameters
    ----------
    rows : numpy.ndarray
        Panel row indices used as moment rows.
    corrected : numpy.ndarray
        Boolean per moment row: the row's next row enters the correction terms.
    """
    panel = bound.panel
    beta = bound.model.discount
    R = bound.anchor_index
    J = len(panel.choices)
    Z = bound.Z[rows]
    n, _, p = Z.shape
    renewal = bound.model.kind == "renewal"
    zR = bound.zR_params
    X = Z - Z[:, R : R + 1, :]
    offset = np.zeros((n, J))
    d = bound.n_targets
    resid = np.zeros((n, d))
    ccp_score = np.zeros(n)
    next_p = np.ones(n)
    if beta > 0:
        mu = nuisances.mu[rows]
        mu_R = mu[:, R, :] if renewal else np.zeros((n, d))
        for j in range(J):
            if j == R:
                continue
            diff = mu[:, j, :] - (mu_R if renewal else 0.0)
            if zR.size:
                X[:, j, zR] += beta * diff[:, :-1]
            if not renewal and bound.zR_constants.size:
                X[:, j, bound.zR_constants] += beta
            offset[:, j] = -beta * diff[:, -1] + (0.0 if renewal else beta * EULER_GAMMA)
        chosen = panel.choice_codes[rows]
        nxt = panel.next_row[rows]
        use = corrected & (nxt >= 0)
        nx = nxt[use]
        q_next = np.concatenate(
            [bound.next_targets_data()[nx], np.log(nuisances.ccp[nx, R])[:, None]], axis=1
        )
        resid[use] = q_next - mu[use, chosen[use], :]
        P_next = nuisances.ccp[nx, R]
        ccp_score[use] = ((panel.choice_codes[nx] == R).astype(np.float64) - P_next) / P_next
        next_p[use] = P_next
        corrected = use
    X[:, R, :] = 0.0
    if not np.all(np.isfinite(X)) or not np.all(np.isfinite(offset)):
        raise FloatingPointError("non-finite constructed regressors; check the nuisances")
    return MomentSystem(
        X=X,
        offset=offset,
        chosen=panel.choice_codes[rows],
        units=panel.unit_codes[rows],
        corrected=np.asarray(corrected, dtype=bool),
        target_resid=resid,
        ccp_score=ccp_score,
        zR_params=zR,
        discount=beta,
        anchor=R,
        next_anchor_p=next_p,
    )
