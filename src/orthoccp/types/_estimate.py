r"""Finite permanent types with discrete states: EM with model-updated CCPs, polished to the
mixture maximum likelihood (Arcidiacono & Miller 2011).

Unit i has a permanent type :math:`k \in \{1, \dots, K\}` with probability :math:`\pi_k`. Type k
adds :math:`\alpha_{kc}` to the flow utility of each choice c in ``type_shifts``
(:math:`\alpha_{1c} = 0`). Given the transitions :math:`\hat F` (estimated from the data, the
same for every type) the mixture log-likelihood is

.. math::

    \ell(\theta, \pi) = \sum_i \ln \sum_k \pi_k \prod_t P_k(a_{it} \mid s_{it}; \theta),

with :math:`P_k(\theta)` type k's exact CCPs. The types are stacked as a block-diagonal state
space (state :math:`(k, s)` never changes its k), so every type's Hotz--Miller inversion is one
sparse solve (:func:`orthoccp.discrete.hotz_miller_values`'s machinery).

*EM with CCPs updated from the model* (Arcidiacono & Miller 2011, section 5): given CCPs
:math:`P` and the current estimate, the E-step computes each unit's posterior
:math:`q_{ik} \propto \pi_k \prod_t \Psi_k(\theta, P)(a_{it} \mid s_{it})`; the M-step sets
:math:`\pi_k = \bar q_k` and maximises the posterior-weighted pseudo-likelihood
:math:`\sum_{k,s,j} n^q_{ksj} \ln \Psi_k(\theta, P)_j(s)` (the discrete estimators' cell logit with
weighted counts); then :math:`P \leftarrow \Psi(\theta, P)`. At its fixed point
:math:`P_k = P_k(\theta)` and, by the zero-Jacobian property of :math:`\Psi` there, the
first-order conditions are those of :math:`\ell`. EM converges linearly, so the fixed point is
then polished by Newton steps on :math:`\ell` itself (exact CCPs by policy iteration, analytic
scores, a central-difference Hessian); the point is the same, to more digits.

*Inference* comes from the unit-level scores of :math:`\ell` (not from the EM's own
information): :math:`\hat V = H^{-1} (\sum_i \phi_i \phi_i') H^{-1}` with
:math:`\phi_i = s_i + c_i`, where :math:`s_i` is unit i's score in :math:`(\theta, \pi_2, \dots,
\pi_K)` and :math:`c_i` the first-order effect of unit i's transitions on the summed score
through :math:`\hat F` (two-step estimation; Newey & McFadden 1994, Theorem 6.1; the
derivative of the score in each estimated transition probability by central differences).
"""

from __future__ import annotations

import time
import warnings
from collections.abc import Hashable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, ClassVar

import numpy as np
import pandas as pd
from scipy import sparse
from scipy.special import expit, logsumexp
from scipy.stats import norm

from .._errors import EstimationError, InputError, OrthoCCPWarning
from .._arrays import label_index
from .._labels import show_label
from .._options import check_option
from .._random import stream
from .._version import __version__
from ..covariance import check_cov_name, estimate_covariance
from ..data import Panel
from ..discrete._estimate import DiscreteProblem, build_problem
from ..discrete._inversion import PolicySystem, inversion_terms
from ..discrete._pseudo import cell_logit, newton_pseudo
from ..results import (Details, Results, RowAccounting, covariance_line,
                       variance_share_lines)

__all__ = ["TYPES_ASSUMPTIONS", "TypesDetails", "TypesResults", "estimate_types"]

TYPES_ASSUMPTIONS = (
    "type-I extreme-value (logit) shocks, i.i.d. across units, choices and periods",
    "known discount factor",
    "K permanent types, independent of the first observed state; the transitions are the "
    "same for every type",
    "stationary payoffs and transitions",
    "the maximum found from the starts tried is the global maximum of the mixture likelihood",
)

_POLICY_TOL = 1e-13
#: Pseudo-observations per state of the data-updated CCPs, spread by the sample's choice
#: shares (keeps a state seen with one choice only off the boundary, where ln P diverges).
_PSEUDO = 0.5


@dataclass(frozen=True, eq=False)
class TypesDetails(Details):
    """Details of :func:`estimate_types`.

    Attributes
    ----------
    n_types : int
        K.
    type_shifts : tuple of str
        The choices whose flow utility has a type-specific constant.
    type_slopes : tuple of str
        The utility parameters whose coefficient differs by type.
    ccp_update : {"model", "data"}
        How the EM updated the CCPs: from the model (its fixed point is the mixture maximum
        likelihood) or from the data (posterior-weighted frequencies; a two-step estimator
        that differs from the MLE at order :math:`n^{-1/2}`).
    em_iterations : int
        EM iterations of the best start.
    newton_steps : int
        Newton steps on the mixture likelihood after the EM.
    loglik : float
        ``"model"``: the mixture log-likelihood at the estimate (choices only; the transitions'
        part does not depend on the parameters). ``"data"``: the pseudo-log-likelihood the
        E-step maximises, of :math:`\\Psi(\\hat\\theta, \\hat P)` at the data-updated CCPs; it is
        not the mixture likelihood and may exceed the model update's maximum.
    em_converged : bool
        False when the EM stopped at ``max_em`` iterations (the Newton steps after it then
        finished the fit; ``newton_steps`` says how many).
    starts, starts_agreeing, starts_failed : int
        Starts tried, those that reached the reported maximum (log-likelihood within 1e-6,
        parameters within 1e-4), and those that failed (an empty type or no convergence).
    shares : tuple of float
        :math:`\\hat\\pi_1, \\dots, \\hat\\pi_K` (type 1's share is one minus the others'); with
        share covariates, the sample averages of the units' type probabilities.
    share_errors : tuple of float
        Their standard errors (by the delta method where they are not parameters).
    share_covariates : tuple of str
        The unit columns the type probabilities depend on (empty: constant shares).
    n_states : int
        States of the (single-type) state space.
    posteriors : pandas.DataFrame or None
        (n_units, K) each unit's posterior type probabilities at the estimate, indexed by the
        unit labels.
    ccp : pandas.DataFrame or None
        (K S, J) each type's CCPs at the estimate, indexed by (type, state): the model's
        exact CCPs (``ccp_update="model"``) or the fixed point's data-updated CCPs
        (``"data"``: posterior-weighted frequencies, the model's at unoccupied states). Not
        written to JSON (None when reloaded).
    """

    kind: ClassVar[str] = "types"
    assumptions: ClassVar[tuple[str, ...]] = TYPES_ASSUMPTIONS

    n_types: int
    type_shifts: tuple[str, ...]
    ccp_update: str
    em_iterations: int
    newton_steps: int
    loglik: float
    starts: int
    starts_agreeing: int
    starts_failed: int
    shares: tuple[float, ...]
    share_errors: tuple[float, ...]
    n_states: int
    type_slopes: tuple[str, ...] = ()
    share_covariates: tuple[str, ...] = ()
    em_converged: bool = True
    posteriors: pd.DataFrame | None = field(default=None, repr=False)
    ccp: pd.DataFrame | None = field(default=None, repr=False)

    def method(self, debiased: bool) -> str:
        if self.ccp_update == "data":
            return ("finite-mixture two-step CCP estimator with discrete states (EM with "
                    "CCPs updated from the data), Arcidiacono & Miller (2011)")
        return ("finite-mixture maximum likelihood with discrete states (EM with "
                "model-updated CCPs), Arcidiacono & Miller (2011)")

    def title(self, res: Results) -> str:
        varying = ", ".join([*self.type_shifts, *(f"the {s} slope" for s in self.type_slopes)])
        return (f"model: {self.n_types} permanent types shifting {varying}; {self.n_states} "
                f"states, discount {res.model['discount']}")

    def share_interval(self, k: int, level: float = 0.95) -> tuple[float, float]:
        r"""Type ``k``'s (1-based) share interval, built on the log-odds scale by the delta
        method, :math:`\mathrm{logit}^{-1}(\mathrm{logit}\,\hat\pi \pm z\,
        \mathrm{se}/(\hat\pi(1-\hat\pi)))`: it stays inside (0, 1)."""
        s, e = self.shares[k - 1], self.share_errors[k - 1]
        half = float(norm.ppf(0.5 + level / 2)) * e / (s * (1.0 - s))
        centre = np.log(s / (1.0 - s))
        return float(expit(centre - half)), float(expit(centre + half))

    def lines(self, res: Results, *, plugin: bool) -> list[str]:
        shares = ", ".join(
            f"type {k + 1} {s:.3f} ({e:.3f}) [{lo:.3f}, {hi:.3f}]"
            for k, (s, e) in enumerate(zip(self.shares, self.share_errors))
            for lo, hi in [self.share_interval(k + 1)])
        em = (f"EM iterations {self.em_iterations}" if self.em_converged else
              f"EM stopped at its cap of {self.em_iterations} iterations")
        lines = [f"units {res.n_units}; {res.accounting.describe()}",
                 f"type shares (s.e.) [95% interval on the log-odds scale]: {shares}",
                 f"CCPs updated from the {self.ccp_update}; "
                 + ("pseudo-" if self.ccp_update == "data" else "")
                 + f"mixture log-likelihood {self.loglik:.4f}; {em}, then "
                 f"{self.newton_steps} Newton steps",
                 f"starts: {self.starts_agreeing} of {self.starts} reached this maximum"
                 + (f" ({self.starts_failed} failed)" if self.starts_failed else "")]
        lines.append(covariance_line(res.cov_type, res.small_sample)
                     + "; scores of the mixture likelihood")
        lines.extend(variance_share_lines(
            res.decomposition, "variance shares (choices: the likelihood's scores, "
            "transitions: the transition estimate's noise):"))
        return lines

    def to_dict(self) -> dict[str, Any]:
        post = self.posteriors
        return {"kind": self.kind, "n_types": self.n_types,
                "type_shifts": list(self.type_shifts), "type_slopes": list(self.type_slopes),
                "share_covariates": list(self.share_covariates),
                "ccp_update": self.ccp_update,
                "em_iterations": self.em_iterations, "em_converged": self.em_converged,
                "newton_steps": self.newton_steps,
                "loglik": self.loglik, "starts": self.starts,
                "starts_agreeing": self.starts_agreeing, "starts_failed": self.starts_failed,
                "shares": list(self.shares), "share_errors": list(self.share_errors),
                "n_states": self.n_states,
                "posteriors": None if post is None else {
                    "units": [str(u) for u in post.index],
                    "values": post.to_numpy().tolist()}}

    @classmethod
    def from_dict(cls, doc: Any, *, index: pd.Index, std_errors: pd.Series) -> TypesDetails:
        post = doc.get("posteriors")
        frame = None if post is None else pd.DataFrame(
            post["values"], index=pd.Index(post["units"], name="unit"),
            columns=[f"type{k + 1}" for k in range(int(doc["n_types"]))])
        return cls(
            n_types=int(doc["n_types"]), type_shifts=tuple(doc["type_shifts"]),
            type_slopes=tuple(doc.get("type_slopes", ())),
            share_covariates=tuple(doc.get("share_covariates", ())),
            ccp_update=str(doc["ccp_update"]), em_iterations=int(doc["em_iterations"]),
            em_converged=bool(doc.get("em_converged", True)),
            newton_steps=int(doc["newton_steps"]), loglik=float(doc["loglik"]),
            starts=int(doc["starts"]), starts_agreeing=int(doc["starts_agreeing"]),
            starts_failed=int(doc["starts_failed"]), shares=tuple(doc["shares"]),
            share_errors=tuple(doc["share_errors"]), n_states=int(doc["n_states"]),
            posteriors=frame)


@dataclass(frozen=True, eq=False)
class TypesResults(Results):
    """:class:`~orthoccp.Results` of :func:`estimate_types`."""

    details: TypesDetails


# --------------------------------------------------------------------------- the mixture
class _Mixture:
    """The stacked-type problem: design, transitions, unit cell counts and the likelihood."""

    def __init__(self, problem: DiscreteProblem, shifts: Sequence[int], slopes: Sequence[int],
                 K: int, W: np.ndarray | None = None) -> None:
        self.problem, self.K, self.W = problem, K, W
        S, J, p = problem.design.shape
        self.S, self.J, self.p0 = S, J, p
        m = len(shifts) + len(slopes)  # type-specific columns per type
        Z = np.zeros((K * S, J, p + (K - 1) * m))
        for k in range(K):
            rows = slice(k * S, (k + 1) * S)
            Z[rows, :, :p] = problem.design
            if k > 0:
                first = p + (k - 1) * m
                for c, j in enumerate(shifts):  # a constant on choice j
                    Z[rows, j, first + c] = 1.0
                for c, col in enumerate(slopes):  # the regressor of a base parameter
                    Z[rows, :, first + len(shifts) + c] = problem.design[:, :, col]
        self.Z, self.p = Z, Z.shape[2]
        self.beta = problem.discount
        self.set_transitions(problem.mats)
        cells = problem.row_state * J + problem.row_choice
        self.C = sparse.csr_matrix(
            (np.ones(cells.size), (problem.row_unit, cells)),
            shape=(problem.n_units, S * J))
        self.shares = problem.counts.sum(axis=0) / problem.counts.sum()
        self.seen = problem.counts.sum(axis=1) > 0

    def set_transitions(self, mats: Sequence[sparse.csr_matrix]) -> None:
        eye = sparse.identity(self.K, format="csr")
        self.mats = tuple(sparse.kron(eye, sparse.csr_matrix(m), format="csr") for m in mats)
        self.system = PolicySystem(self.mats, self.beta)

    def terms(self, theta: np.ndarray, P: np.ndarray) -> tuple[np.ndarray, np.ndarray,
                                                                np.ndarray, np.ndarray]:
        """Zt, et and :math:`\\Psi(\\theta, P)` with its logarithm."""
        inv = inversion_terms(P, self.Z, self.mats, self.beta, self.system)
        lam, loglam = cell_logit(inv.Zt, inv.et, theta)
        return inv.Zt, inv.et, lam, loglam

    def exact(self, theta: np.ndarray, P: np.ndarray) -> tuple[np.ndarray, ...]:
        """Every type's exact CCPs at theta by policy iteration from P (quadratic
        convergence), with the terms at them."""
        for _ in range(200):
            Zt, et, lam, loglam = self.terms(theta, P)
            if np.max(np.abs(lam - P)) < _POLICY_TOL:
                return Zt, et, lam, loglam
            P = lam
        raise EstimationError("policy iteration did not converge to the model's CCPs.")

    def unit_loglik(self, loglam: np.ndarray) -> np.ndarray:
        """(n_units, K) :math:`\\sum_t \\ln P_k(a_{it} \\mid s_{it})`."""
        S = self.S
        return np.column_stack([self.C @ loglam[k * S:(k + 1) * S].ravel()
                                for k in range(self.K)])

    @staticmethod
    def posterior(ll: np.ndarray, pi: np.ndarray) -> tuple[np.ndarray, float]:
        """Posteriors and the log-likelihood; ``pi`` is (K,) or, with share covariates,
        (n_units, K)."""
        with np.errstate(divide="ignore"):
            lp = np.log(pi)
        a = ll + (lp[None, :] if lp.ndim == 1 else lp)
        lse = logsumexp(a, axis=1)
        return np.exp(a - lse[:, None]), float(lse.sum())

    def weighted_counts(self, q: np.ndarray) -> np.ndarray:
        """(K S, J) posterior-weighted cell counts."""
        return np.asarray((self.C.T @ q).T).reshape(self.K * self.S, self.J)

    def scores(self, eta: np.ndarray, P: np.ndarray) -> tuple[float, np.ndarray, np.ndarray,
                                                            np.ndarray]:
        """Log-likelihood, (n_units, p + K - 1) unit scores, posteriors and exact CCPs."""
        theta, pi = self.split(eta)
        Zt, _, lam, loglam = self.exact(theta, P)
        q, L = self.posterior(self.unit_loglik(loglam), pi)
        g = Zt - np.einsum("sj,sjp->sp", lam, Zt)[:, None, :]  # d ln P_j(s) / d theta
        S, J = self.S, self.J
        s_theta = sum(q[:, [k]] * (self.C @ g[k * S:(k + 1) * S].reshape(S * J, self.p))
                      for k in range(self.K))
        if self.W is None:
            s_pi = q[:, 1:] / pi[None, 1:] - (q[:, 0] / pi[0])[:, None]
        else:  # d ln L_i / d gamma_k = (q_ik - pi_ik) w_i
            s_pi = ((q - pi)[:, 1:, None] * self.W[:, None, :]).reshape(q.shape[0], -1)
        return L, np.column_stack([s_theta, s_pi]), q, lam

    def split(self, eta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        r"""theta and the type probabilities: (K,) shares, or with share covariates the
        (n_units, K) multinomial logit :math:`\pi_{ik} \propto \exp(w_i'\gamma_k)`,
        :math:`\gamma_1 = 0`."""
        theta, rest = eta[:self.p], eta[self.p:]
        if self.W is None:
            return theta, np.concatenate([[1.0 - rest.sum()], rest])
        return theta, _softmax_shares(self.W, rest.reshape(self.K - 1, -1))


def _softmax_shares(W: np.ndarray, gamma: np.ndarray) -> np.ndarray:
    r"""(n, K) :math:`\pi_{ik} = \exp(w_i'\gamma_k) / \sum_l \exp(w_i'\gamma_l)`,
    :math:`\gamma_1 = 0`."""
    v = np.column_stack([np.zeros(W.shape[0]), W @ gamma.T])
    v -= v.max(axis=1, keepdims=True)
    e = np.exp(v)
    return e / e.sum(axis=1, keepdims=True)


def _fit_share_logit(W: np.ndarray, q: np.ndarray, gamma: np.ndarray) -> np.ndarray:
    r"""The M-step of the type probabilities: the multinomial logit of the posteriors on the
    unit covariates, :math:`\max_\gamma \sum_i \sum_k q_{ik} \ln \pi_{ik}(\gamma)`, by
    Newton steps (step-halved) from ``gamma``."""
    K1, c = gamma.shape
    g = gamma.copy()

    def value(x: np.ndarray) -> float:
        return float(np.sum(q * np.log(np.maximum(_softmax_shares(W, x), 1e-300))))

    f = value(g)
    for _ in range(100):
        pi = _softmax_shares(W, g)
        grad = ((q - pi)[:, 1:].T @ W).ravel()
        H = np.zeros((K1 * c, K1 * c))
        for a in range(K1):
            for b in range(K1):
                w = pi[:, a + 1] * ((a == b) - pi[:, b + 1])
                H[a * c:(a + 1) * c, b * c:(b + 1) * c] = (W * w[:, None]).T @ W
        step = np.linalg.lstsq(H, grad, rcond=None)[0].reshape(K1, c)
        t_ = 1.0
        while value(g + t_ * step) < f - 1e-12 * max(1.0, abs(f)) and t_ > 1e-8:
            t_ *= 0.5
        g = g + t_ * step
        f_new = value(g)
        if np.max(np.abs(t_ * step)) < 1e-12 * (1 + np.max(np.abs(g))):
            break
        f = f_new
    return g


def _central(total: Any, omega: np.ndarray, bounded: int, mix: _Mixture) -> np.ndarray:
    """Central-difference Jacobian of ``total`` (the summed unit moments) at ``omega``; the
    entries from ``mix.p`` on are probabilities and the step keeps them inside (0, 1)."""
    n = omega.size
    out = np.empty((n, n))
    for j in range(n):
        h = 1e-5 * max(1.0, abs(omega[j]))
        if j >= mix.p and (mix.W is None or j >= bounded):
            h = min(h, 0.25 * omega[j], 0.25 * (1.0 - omega[j]))
            if j < bounded:  # a share: type 1's share is one minus the others'
                h = min(h, 0.25 * mix.split(omega[:bounded])[1][0])
        up, dn = omega.copy(), omega.copy()
        up[j] += h
        dn[j] -= h
        out[:, j] = (total(up) - total(dn)) / (2 * h)
    return out


def _hessian(mix: _Mixture, eta: np.ndarray, P: np.ndarray) -> np.ndarray:
    """Central-difference derivative of the summed scores of the mixture likelihood."""
    H = _central(lambda e: mix.scores(e, P)[1].sum(axis=0), eta, eta.size, mix)
    return 0.5 * (H + H.T)


@dataclass
class _Fit:
    eta: np.ndarray
    loglik: float
    P: np.ndarray
    em_iterations: int
    newton_steps: int = 0
    converged: bool = False
    em_converged: bool = True


def _frequencies(mix: _Mixture, q: np.ndarray, fallback: np.ndarray) -> np.ndarray:
    """(K S, J) posterior-weighted cell frequencies with ``_PSEUDO`` pseudo-observations spread
    by the sample's choice shares; ``fallback`` at states no row occupies."""
    n = mix.weighted_counts(q)
    P = (n + _PSEUDO * mix.shares[None, :]) / (n.sum(axis=1, keepdims=True) + _PSEUDO)
    return np.where(np.tile(mix.seen, mix.K)[:, None], P, fallback)


def _em(mix: _Mixture, q: np.ndarray, *, names: tuple[str, ...], max_em: int,
        tol: float, update: str) -> _Fit:
    """EM from initial posteriors q, the CCPs updated from the model or from the data."""
    P = _frequencies(mix, q, np.tile(mix.shares, (mix.K * mix.S, 1)))
    theta: np.ndarray | None = None
    gamma = None if mix.W is None else np.zeros((mix.K - 1, mix.W.shape[1]))
    it, done = 0, False
    for it in range(1, max_em + 1):
        if gamma is None:
            pi = q.mean(axis=0)
        else:
            gamma = _fit_share_logit(mix.W, q, gamma)
            pi = _softmax_shares(mix.W, gamma)
        if pi.reshape(-1, mix.K).mean(axis=0).min() < 1e-6:
            raise EstimationError("a type's share fell below 1e-6: an empty type.")
        Zt, et, _, _ = mix.terms(np.zeros(mix.p) if theta is None else theta, P)
        theta = newton_pseudo(Zt, et, mix.weighted_counts(q), theta, names=names)[0]
        lam, loglam = cell_logit(Zt, et, theta)
        q_new, L = mix.posterior(mix.unit_loglik(loglam), pi)
        P_new = lam if update == "model" else _frequencies(mix, q_new, lam)
        change = max(float(np.max(np.abs(P_new - P))), float(np.max(np.abs(q_new - q))))
        P, q = P_new, q_new
        if change < tol:
            done = True
            break
    assert theta is not None
    eta = np.concatenate([theta, q.mean(axis=0)[1:] if gamma is None else
                          _fit_share_logit(mix.W, q, gamma).ravel()])
    if update == "data":
        return _Fit(eta=eta, loglik=_DataSystem(mix).loglik(eta, P), P=P, em_iterations=it,
                    em_converged=done)
    return _Fit(eta=eta, loglik=mix.scores(eta, P)[0], P=P, em_iterations=it,
                em_converged=done)


class _DataSystem:
    r"""The fixed point of the EM with CCPs updated from the data, as unit-level moments.

    Unknowns :math:`\omega = (\theta, \pi_2..\pi_K, P)` with :math:`P_k(s, j)`, j >= 1, at
    every state. Unit i's moments: the posterior-weighted pseudo-score
    :math:`\sum_k q_{ik} \sum_t \partial \ln \Psi_k(\theta, P)(a_{it}|s_{it}) / \partial\theta`,
    :math:`q_{ik} - \pi_k`, and at each state a row occupies
    :math:`q_{ik}(n_i(s, j) - n_i(s) P_k(s, j)) + c (\bar P_j - P_k(s, j)) / n` (the weighted
    frequencies with c pseudo-observations); at other states
    :math:`(P_k(s, j) - \Psi_k(\theta, P)(s, j)) / n` (the model's CCPs). The posteriors
    :math:`q_{ik} \propto \pi_k \prod_t \Psi_k(\theta, P)(a_{it}|s_{it})` are the E-step's.
    """

    def __init__(self, mix: _Mixture) -> None:
        self.mix = mix
        K, S, J = mix.K, mix.S, mix.J
        self.q_size = mix.p + K - 1
        n = mix.problem.n_units
        # each unit's count per state, and per (state, choice >= 1)
        self.Cs = np.asarray((mix.C @ sparse.kron(sparse.identity(S), np.ones((J, 1)))).todense())
        free = np.tile(np.arange(J) >= 1, S)
        self.Cj = np.asarray(mix.C[:, np.flatnonzero(free)].todense())  # (n, S (J-1))
        self.n = n

    def unpack(self, omega: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        mix = self.mix
        theta, pi = mix.split(omega[:self.q_size])
        free = omega[self.q_size:].reshape(mix.K * mix.S, mix.J - 1)
        return theta, pi, np.column_stack([1.0 - free.sum(axis=1), free])

    @staticmethod
    def pack(eta: np.ndarray, P: np.ndarray) -> np.ndarray:
        return np.concatenate([eta, P[:, 1:].ravel()])

    def valid(self, omega: np.ndarray) -> bool:
        _, pi, P = self.unpack(omega)
        return bool(pi.min() > 0 and P.min() > 0)

    def loglik(self, eta: np.ndarray, P: np.ndarray) -> float:
        """The mixture log-likelihood of :math:`\\Psi(\\theta, P)`, the E-step's."""
        theta, pi = self.mix.split(eta)
        loglam = self.mix.terms(theta, P)[3]
        return self.mix.posterior(self.mix.unit_loglik(loglam), pi)[1]

    def moments(self, omega: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(n_units, d) unit moments and the (n_units, K) posteriors."""
        mix, K, S, J = self.mix, self.mix.K, self.mix.S, self.mix.J
        theta, pi, P = self.unpack(omega)
        Zt, _, lam, loglam = mix.terms(theta, P)
        q, _ = mix.posterior(mix.unit_loglik(loglam), pi)
        g = Zt - np.einsum("sj,sjp->sp", lam, Zt)[:, None, :]
        s_theta = sum(q[:, [k]] * (mix.C @ g[k * S:(k + 1) * S].reshape(S * J, mix.p))
                      for k in range(K))
        parts = [s_theta, q[:, 1:] - pi[None, 1:]]
        prior = np.tile(mix.shares[1:], S)
        seen = np.repeat(mix.seen, J - 1)
        for k in range(K):
            Pk = P[k * S:(k + 1) * S, 1:].ravel()
            data = q[:, [k]] * (self.Cj - np.repeat(self.Cs, J - 1, axis=1) * Pk[None, :]) \
                + _PSEUDO * (prior - Pk)[None, :] / self.n
            model = np.broadcast_to((Pk - lam[k * S:(k + 1) * S, 1:].ravel()) / self.n,
                                    data.shape)
            parts.append(np.where(seen[None, :], data, model))
        return np.column_stack(parts), q

    def total(self, omega: np.ndarray) -> np.ndarray:
        return self.moments(omega)[0].sum(axis=0)

    def jacobian(self, omega: np.ndarray) -> np.ndarray:
        return _central(self.total, omega, self.q_size, self.mix)

    def solve(self, fit: _Fit, *, max_steps: int = 30) -> _Fit:
        """Newton steps on the summed moments from the EM's point (step-halved)."""
        omega = self.pack(fit.eta, fit.P)
        f = self.total(omega)
        steps = 0
        for steps in range(1, max_steps + 1):
            try:
                step = -np.linalg.solve(self.jacobian(omega), f)
            except np.linalg.LinAlgError as exc:
                raise EstimationError("the data-updated EM's moments have a singular "
                                      "Jacobian; the types are not identified.") from exc
            if np.all(np.abs(step) <= 1e-10 * (1.0 + np.abs(omega))):
                _, _, P = self.unpack(omega)
                eta = omega[:self.q_size]
                return _Fit(eta, self.loglik(eta, P), P, fit.em_iterations, steps, True,
                            fit.em_converged)
            t = 1.0
            while True:
                cand = omega + t * step
                if self.valid(cand):
                    f_new = self.total(cand)
                    if np.linalg.norm(f_new) <= np.linalg.norm(f) * (1 + 1e-9) or t < 1e-3:
                        break
                t *= 0.5
                if t < 1e-8:
                    break
            if t < 1e-8:
                break
            omega, f = cand, f_new
        _, _, P = self.unpack(omega)
        eta = omega[:self.q_size]
        return _Fit(eta, self.loglik(eta, P), P, fit.em_iterations, steps, False,
                    fit.em_converged)


def _relabel(mix: _Mixture, fit: _Fit, const: Sequence[int], m: int) -> _Fit:
    """Order the types by the first shifted choice's constant, lowest first (type 1 is the
    reference), so that labels do not swap between starts or samples."""
    theta, pi = mix.split(fit.eta)
    p0, K = mix.p0, mix.K
    alpha = np.zeros((K, m))
    alpha[1:] = theta[p0:].reshape(K - 1, m)
    level = theta[list(const)][None, :] + alpha  # (K, m) each type's constants
    order = np.argsort(level[:, 0], kind="stable")
    if np.array_equal(order, np.arange(K)):
        return fit
    new = theta.copy()
    new[list(const)] = level[order[0]]
    new[p0:] = (level[order[1:]] - level[order[0]][None, :]).ravel()
    S = mix.S
    P = np.concatenate([fit.P[k * S:(k + 1) * S] for k in order])
    if mix.W is None:
        rest = pi[order][1:]
    else:  # re-reference the log-odds to the new type 1
        g = np.zeros((K, mix.W.shape[1]))
        g[1:] = fit.eta[mix.p:].reshape(K - 1, -1)
        rest = (g[order[1:]] - g[order[0]][None, :]).ravel()
    eta = np.concatenate([new, rest])
    return _Fit(eta=eta, loglik=fit.loglik, P=P, em_iterations=fit.em_iterations,
                em_converged=fit.em_converged)


def _polish(mix: _Mixture, fit: _Fit, *, max_steps: int = 50) -> _Fit:
    """Newton steps on the mixture log-likelihood (step-halved, shares kept inside (0, 1))."""
    eta, P = fit.eta.copy(), fit.P
    L, sc, _, P = mix.scores(eta, P)
    steps = 0
    for steps in range(1, max_steps + 1):
        H = _hessian(mix, eta, P)
        grad = sc.sum(axis=0)
        # Newton where -H is positive definite; elsewhere a Levenberg-Marquardt step
        # (-H + lambda I), which is an ascent direction
        top = float(np.linalg.eigvalsh(H).max())
        lam = 0.0 if top < 0 else top + 1e-6 * max(1.0, float(np.abs(np.diag(H)).max()))
        try:
            step = np.linalg.solve(lam * np.eye(eta.size) - H, grad)
        except np.linalg.LinAlgError as exc:
            raise EstimationError("the mixture likelihood's Hessian is singular at the EM "
                                  "fixed point; the types are not identified.") from exc
        if np.all(np.abs(step) <= 1e-10 * (1.0 + np.abs(eta))):
            return _Fit(eta, L, P, fit.em_iterations, steps, True, fit.em_converged)
        t = 1.0
        while True:
            cand = eta + t * step
            pi = mix.split(cand)[1]
            if pi.min() > 0:
                L_new, sc_new, _, P_new = mix.scores(cand, P)
                if L_new >= L - 1e-10 * max(1.0, abs(L)):
                    break
            t *= 0.5
            if t < 1e-8:
                return _Fit(eta, L, P, fit.em_iterations, steps, False, fit.em_converged)
        eta, L, sc, P = cand, L_new, sc_new, P_new
    return _Fit(eta, L, P, fit.em_iterations, steps, False, fit.em_converged)


def _initial_posteriors(mix: _Mixture, shift_choice: int, r: int, seed: int) -> np.ndarray:
    """Start 0: units ranked by how often they make the first shifted choice, in K groups
    (weights 0.7 on the group's type); other starts: Dirichlet(1) draws."""
    n, K = mix.problem.n_units, mix.K
    if r == 0:
        rows = mix.problem.row_choice == shift_choice
        freq = (np.bincount(mix.problem.row_unit, weights=rows, minlength=n)
                / np.bincount(mix.problem.row_unit, minlength=n))
        rank = np.argsort(np.argsort(freq, kind="stable"), kind="stable")
        group = np.minimum(rank * K // n, K - 1)
        q = np.full((n, K), 0.3 / max(K - 1, 1))
        q[np.arange(n), group] = 0.7
        return q
    return stream(seed, "types", split=r).dirichlet(np.ones(K), size=n)


def _transition_correction(mix: _Mixture, total: Any, dim: int) -> np.ndarray:
    """(n_units, dim) each unit's first-order effect on the summed moments ``total()``
    through F-hat (central differences in each estimated transition probability, then
    :meth:`~orthoccp.discrete.TransitionMatrices.directional`)."""
    problem, J, S = mix.problem, mix.J, mix.S
    tm = problem.transitions
    base = [sparse.csr_matrix(m) for m in tm.matrices]
    G = np.zeros((S, J, S, dim))  # d summed moments / d F_j(s, s')
    for F in base:
        F.sum_duplicates()  # one stored entry per (s, s'): the one each step moves
    for j, F in enumerate(base):
        rows = np.repeat(np.arange(S), np.diff(F.indptr))
        for idx, (s, s1) in enumerate(zip(rows, F.indices)):
            out = []
            for sign in (1.0, -1.0):
                moved = F.copy()
                moved.data[idx] += sign * 1e-6
                mix.set_transitions([moved if i == j else m for i, m in enumerate(base)])
                out.append(total())
            G[s, j, s1] = (out[0] - out[1]) / 2e-6
    mix.set_transitions(base)
    out_units = np.zeros((problem.n_units, dim))
    for s1 in np.flatnonzero(np.any(G != 0, axis=(0, 1, 3))):
        e = np.zeros(S)
        e[s1] = 1.0
        out_units += tm.directional(G[:, :, s1, :], e, problem.n_units)
    return out_units


def _shift_columns(problem: DiscreteProblem,
                   type_shifts: Sequence[Hashable]) -> tuple[list[int], list[int]]:
    """The shifted choices' positions and the design column of each one's constant."""
    if isinstance(type_shifts, (str, bytes)) and type_shifts in problem.choices:
        type_shifts = [type_shifts]  # one choice label given alone
    if isinstance(type_shifts, (str, bytes)) or not isinstance(type_shifts, Sequence) \
            or len(type_shifts) == 0:
        raise InputError(f"type_shifts must list at least one choice (a choice with a constant "
                         f"in the utility), as a list such as [{show_label(problem.choices[-1])}]; "
                         f"got {type_shifts!r}; the choices are "
                         f"{', '.join(map(show_label, problem.choices))}.")
    shifts, const = [], []
    for c in type_shifts:
        if c not in problem.choices:
            raise InputError(f"type_shifts names {show_label(c)}, which is not a choice; the "
                             f"choices are {', '.join(map(show_label, problem.choices))}.")
        j = problem.choices.index(c)
        is_const = [np.all(problem.design[:, j, col] == 1.0)
                    and np.all(np.delete(problem.design[:, :, col], j, axis=1) == 0.0)
                    for col in range(problem.design.shape[2])]
        if not any(is_const):
            raise InputError(f"type_shifts: choice {show_label(c)} has no constant in utility; "
                             f"add one, e.g. utility[{show_label(c)}] = {{'cost': '1'}}: the "
                             f"types shift it.")
        if j in shifts:
            raise InputError(f"type_shifts lists {show_label(c)} twice.")
        shifts.append(j)
        const.append(int(np.flatnonzero(is_const)[0]))
    return shifts, const


def _share_design(panel: Panel, columns: Sequence[str],
                  ccp_update: str) -> tuple[np.ndarray | None, tuple[str, ...]]:
    """(n_units, 1 + c) the type probabilities' covariates, one row per unit in the panel's
    sorted unit order (a constant first), or None without covariates."""
    if isinstance(columns, (str, bytes)) or not isinstance(columns, Sequence):
        raise InputError(f"share_covariates must be a list of column names, got {columns!r}.")
    if not columns:
        return None, ()
    if ccp_update != "model":
        raise InputError("share_covariates needs ccp_update='model' (the data update's moment "
                         "system has the shares alone).")
    frame = panel.frame
    out = []
    for c in columns:
        if c not in frame.columns:
            raise InputError(f"share_covariates names {c!r}, which is not a column of the panel; "
                             f"its columns are {', '.join(map(str, frame.columns))}.")
        col = pd.to_numeric(frame[c], errors="coerce")
        if col.isna().any():
            raise InputError(f"share_covariates column {c!r} has {int(col.isna().sum())} "
                             f"missing or non-numeric values; type probabilities need a number "
                             f"for every unit.")
        by_unit = col.groupby(panel.unit_codes)
        varying = int((by_unit.nunique() > 1).sum())
        if varying:
            raise InputError(f"share_covariates column {c!r} changes within {varying} units; a "
                             f"unit's type is permanent, so its covariates must be too (use the "
                             f"unit's first value, or a unit mean).")
        out.append(by_unit.first().to_numpy(dtype=float))
    return np.column_stack([np.ones(panel.n_units), *out]), tuple(columns)


def _shares_and_errors(mix: _Mixture, eta: np.ndarray,
                       cov: np.ndarray) -> tuple[np.ndarray, tuple[float, ...]]:
    """The type shares (sample averages of the type probabilities) and their standard errors
    by the delta method (central-difference gradient)."""
    def shares(e: np.ndarray) -> np.ndarray:
        return mix.split(e)[1].reshape(-1, mix.K).mean(axis=0)

    grad = np.empty((mix.K, eta.size))
    for j in range(eta.size):
        h = 1e-6 * max(1.0, abs(eta[j]))
        up, dn = eta.copy(), eta.copy()
        up[j] += h
        dn[j] -= h
        grad[:, j] = (shares(up) - shares(dn)) / (2 * h)
    V = grad @ cov @ grad.T
    return shares(eta), tuple(float(v) for v in np.sqrt(np.maximum(np.diag(V), 0.0)))


def _slope_columns(problem: DiscreteProblem, type_slopes: Sequence[str],
                   const: Sequence[int]) -> list[int]:
    """The design columns of the parameters whose coefficient differs by type."""
    if isinstance(type_slopes, (str, bytes)) or not isinstance(type_slopes, Sequence):
        raise InputError(f"type_slopes must be a list of parameter names, e.g. "
                         f"type_slopes=[{problem.parameters[0]!r}], got {type_slopes!r}.")
    cols: list[int] = []
    for name in type_slopes:
        if name not in problem.parameters:
            raise InputError(f"type_slopes names {name!r}, which is not a parameter of the "
                             f"utility; the parameters are {', '.join(problem.parameters)}.")
        col = problem.parameters.index(name)
        if col in const or col in cols:
            raise InputError(f"type_slopes: {name!r} already differs by type (a shifted "
                             f"constant, or listed twice).")
        cols.append(col)
    return cols


# --------------------------------------------------------------------------- front door
def estimate_types(
    panel: Panel,
    *,
    utility: Mapping[Hashable, Mapping[str, Any]],
    discount: float,
    type_shifts: Sequence[Hashable],
    type_slopes: Sequence[str] = (),
    n_types: int = 2,
    n_states: int | None = None,
    transitions: str | Mapping[Any, Any] = "frequency",
    smoothing: float = 0.0,
    reset_choices: Sequence[Hashable] = (),
    reset_state: int = 0,
    increment_range: tuple[int, int] | None = None,
    base: Mapping[Any, Any] | None = None,
    ccp_update: str = "model",
    share_covariates: Sequence[str] = (),
    starts: int = 5,
    initial_posteriors: Any = None,
    max_em: int = 2000,
    tol: float = 1e-7,
    seed: int = 0,
    cov: str = "clustered",
    small_sample: bool = True,
    transition_noise: bool = True,
) -> TypesResults:
    r"""Dynamic logit with K permanent unobserved types and discrete states.

    Parameters
    ----------
    panel : Panel
        The data (one row per unit and period); states as for
        :func:`~orthoccp.discrete.estimate_discrete`.
    utility : mapping
        Choice label -> {parameter: regressor}, as for
        :func:`~orthoccp.discrete.estimate_discrete`. Each choice in ``type_shifts`` needs a
        constant (``"1"``) among its regressors: the types shift it.
    discount : float
        Known :math:`\beta \in [0, 1)`.
    type_shifts : sequence
        Choices whose constant differs by type: parameters ``"<choice>:type<k>"`` for
        k = 2..K, type k's constant minus type 1's. Types are ordered by the first listed
        choice's constant, lowest first.
    type_slopes : sequence of str, default=()
        Utility parameters whose coefficient differs by type: parameters
        ``"<parameter>:type<k>"``, type k's coefficient minus type 1's.
    n_types : int, default=2
        K, at least 2.
    n_states, transitions, smoothing, reset_choices, reset_state, increment_range, base
        The state space and the transitions' first step, as for
        :func:`~orthoccp.discrete.estimate_discrete`; the transitions are the same for
        every type.
    ccp_update : {"model", "data"}, default="model"
        How the EM updates each type's CCPs (Arcidiacono & Miller 2011, section 5): from the
        model, :math:`P \leftarrow \Psi(\theta, P)` (the fixed point is the mixture MLE;
        polished by Newton steps on the likelihood), or from the data, as posterior-weighted
        cell frequencies with 0.5 pseudo-observations per state spread by the sample's choice
        shares (the model's CCPs at states no row occupies). The data update is a two-step
        estimator, cheaper per iteration for large state spaces, that differs from the MLE at
        order :math:`n^{-1/2}`; its fixed point is solved as a system of unit-level moments
        (pseudo-scores, shares, weighted frequencies) and its standard errors come from that
        system's sandwich, so they include the CCPs' estimation.
    share_covariates : sequence of str, default=()
        Numeric panel columns, constant within each unit, on which the type probabilities
        depend through a multinomial logit,
        :math:`\pi_{ik} \propto \exp(\gamma_{k0} + w_i'\gamma_k)` with :math:`\gamma_1 = 0`;
        the parameters ``"logodds:type<k>"`` and ``"logodds:type<k>:<column>"`` replace the
        shares, and ``details.shares`` are the sample averages of :math:`\pi_{ik}`
        (standard errors by the delta method). Needs ``ccp_update="model"``.
    starts : int, default=5
        EM starts: the first from units ranked by how often they make the first shifted
        choice, the others from random posteriors (drawn from ``seed``). The best maximum is
        reported with the number of starts that reached it.
    initial_posteriors : array-like, optional
        (n_units, K) posterior type probabilities (rows in the panel's sorted unit order) for
        the first start instead of the ranking, e.g. a previous estimate's
        ``details.posteriors`` for a warm start.
    max_em : int, default=2000
        Cap on EM iterations per start.
    tol : float, default=1e-7
        EM stops when the sup-norm change of the CCPs and posteriors is below ``tol``; Newton
        steps on the mixture likelihood then converge to 1e-10.
    seed : int, default=0
        Seeds the random starts.
    cov : {"clustered", "heteroskedastic"}, default="clustered"
        The scores are unit-level either way (a unit's history is one likelihood term).
    small_sample : bool, default=True
        Multiply the covariance by G/(G-1).
    transition_noise : bool, default=True
        Add the transition estimate's sampling noise to the covariance.

    Returns
    -------
    TypesResults
        Parameters: the utility's, the type shifts, and the shares ``"share:type<k>"`` of
        types 2..K (type 1's share with its standard error is in ``details.shares``); each
        unit's posterior type probabilities in ``details.posteriors``.

    Notes
    -----
    The mixture likelihood, the EM with model-updated CCPs (Arcidiacono & Miller 2011,
    section 5) and the sandwich from unit-level scores are in the module's docstring
    (:mod:`orthoccp.types`). The first observed state is treated as independent of the type
    (no initial-conditions model), and the standard errors assume the reported maximum is the
    global one: look at ``details.starts_agreeing``.

    References
    ----------
    Arcidiacono, P. and Miller, R. A. (2011). Conditional choice probability estimation of
    dynamic discrete choice models with unobserved heterogeneity. Econometrica 79(6),
    1823--1867.
    Newey, W. K. and McFadden, D. (1994). Large sample estimation and hypothesis testing.
    Handbook of Econometrics 4, ch. 36.
    """
    t_start = time.perf_counter()
    if isinstance(n_types, bool) or not isinstance(n_types, (int, np.integer)) or n_types < 2:
        raise InputError(f"n_types must be an integer >= 2, got {n_types!r}; with one type use "
                         f"orthoccp.discrete.estimate_discrete.")
    if ccp_update not in ("model", "data"):
        raise InputError(f"ccp_update must be 'model' or 'data', got {ccp_update!r}.")
    if isinstance(starts, bool) or not isinstance(starts, (int, np.integer)) or starts < 1:
        raise InputError(f"starts must be an integer >= 1, got {starts!r}.")
    if isinstance(max_em, bool) or not isinstance(max_em, (int, np.integer)) or max_em < 1:
        raise InputError(f"max_em must be an integer >= 1, got {max_em!r}.")
    if not (isinstance(tol, (int, float)) and 0 < tol < 1):
        raise InputError(f"tol must be a number in (0, 1), got {tol!r}.")
    check_cov_name(cov)
    check_option("small_sample", small_sample)
    seed = check_option("seed", seed)
    problem = build_problem(
        panel, utility=utility, discount=discount, n_states=n_states, transitions=transitions,
        smoothing=smoothing, reset_choices=reset_choices, reset_state=reset_state,
        increment_range=increment_range, base=base)
    shifts, const = _shift_columns(problem, type_shifts)
    slopes = _slope_columns(problem, type_slopes, const)
    K, m = int(n_types), len(shifts) + len(slopes)
    W, covariates = _share_design(panel, share_covariates, ccp_update)
    mix = _Mixture(problem, shifts, slopes, K, W)
    per_type = [str(problem.choices[j]) for j in shifts] + [problem.parameters[c] for c in slopes]
    shift_names = tuple(f"{name}:type{k}" for k in range(2, K + 1) for name in per_type)
    varying = const + slopes  # the base columns the type-specific ones shift
    names = problem.parameters + shift_names
    if W is None:
        all_names = names + tuple(f"share:type{k}" for k in range(2, K + 1))
    else:  # log-odds of type k against type 1: a constant and one slope per covariate
        all_names = names + tuple(f"logodds:type{k}" + (f":{c}" if c else "")
                                  for k in range(2, K + 1) for c in ("", *covariates))
    t_first = time.perf_counter() - t_start

    fits: list[_Fit] = []
    failed = 0
    system = _DataSystem(mix) if ccp_update == "data" else None
    given = None if initial_posteriors is None else np.asarray(initial_posteriors, dtype=float)
    if given is not None and (given.shape != (problem.n_units, K) or not np.all(given >= 0)
                              or np.max(np.abs(given.sum(axis=1) - 1.0)) > 1e-8):
        raise InputError(f"initial_posteriors must be a ({problem.n_units}, {K}) array of "
                         f"probabilities whose rows sum to one, got shape {given.shape}.")
    for r in range(int(starts)):
        try:
            q0 = given if (r == 0 and given is not None) else \
                _initial_posteriors(mix, shifts[0], r, seed)
            fit = _relabel(mix, _em(mix, q0,
                                    names=names, max_em=int(max_em), tol=float(tol),
                                    update=ccp_update), varying, m)
            fits.append(_polish(mix, fit) if system is None else system.solve(fit))
        except EstimationError:
            failed += 1
    if not fits:
        raise EstimationError(
            f"every one of the {starts} starts failed (a type emptied or the pseudo-likelihood "
            f"had no finite maximiser); try fewer types or more starts.")
    best = max(fits, key=lambda f: f.loglik)
    agree = sum(1 for f in fits if abs(f.loglik - best.loglik) <= 1e-6 * max(1.0, abs(best.loglik))
                and np.max(np.abs(f.eta - best.eta)) <= 1e-4)
    t_est = time.perf_counter() - t_start - t_first

    if system is None:
        omega = best.eta
        L, sc, q, P = mix.scores(best.eta, best.P)
        H = _hessian(mix, best.eta, P)
        scale = 1.0 / np.sqrt(np.maximum(np.abs(np.diag(H)), 1e-300))
        curvature = float(np.linalg.eigvalsh(-(scale[:, None] * H * scale[None, :])).min())
        flat = curvature <= 1e-8
        def total() -> np.ndarray:
            return mix.scores(best.eta, P)[1].sum(axis=0)
    else:
        omega = system.pack(best.eta, best.P)
        L, P = best.loglik, best.P
        sc, q = system.moments(omega)
        H = system.jacobian(omega)
        curvature = float(1.0 / np.linalg.cond(H))
        flat = curvature <= 1e-12
        def total() -> np.ndarray:
            return system.total(omega)
    levels = np.zeros((K, m))
    levels[1:] = best.eta[mix.p0:mix.p].reshape(K - 1, m)
    gaps = np.abs(levels[:, None, :] - levels[None, :, :]).max(axis=2) + np.eye(K)
    if gaps.min() < 1e-4:  # two types with the same payoffs: their split is not identified
        a, b = np.unravel_index(np.argmin(gaps), gaps.shape)
        curvature, flat = min(curvature, 0.0), True
        shifts_note = f" (types {a + 1} and {b + 1} have the same payoffs)"
    else:
        shifts_note = ""
    if flat:
        pi = mix.split(best.eta)[1]
        raise EstimationError(
            f"the mixture likelihood is not curved downward at the best point found (smallest "
            f"scaled curvature {curvature:.3g}; shares {np.round(pi, 3).tolist()}, shifts "
            f"{np.round(best.eta[mix.p0:mix.p], 3).tolist()}{shifts_note}): the {K} types "
            f"are not identified in this sample, e.g. the data show no difference between types in "
            f"{', '.join(show_label(problem.choices[j]) for j in shifts)}. Estimate with fewer "
            f"types, or one (orthoccp.discrete.estimate_discrete).")
    if agree < len(fits):
        warnings.warn(
            f"{len(fits) - agree} of {len(fits)} EM starts ended at another point of the "
            f"mixture likelihood (the best is reported); raise starts to check that it is the "
            f"global maximum.", OrthoCCPWarning, stacklevel=2)
    if not best.converged:
        warnings.warn(
            f"Newton steps on the mixture likelihood stopped after {best.newton_steps} steps "
            f"short of convergence; the estimate and its standard errors are approximate.",
            OrthoCCPWarning, stacklevel=2)
    corr = np.zeros_like(sc)
    if transition_noise and problem.discount > 0 and \
            problem.transitions.method in ("frequency", "increments"):
        corr = _transition_correction(mix, total, omega.size)
    # the reported parameters' influence terms -H^-1 (moments) (their rows, for the data
    # update, of the whole system's), passed with the Jacobian -I
    Hinv = np.linalg.inv(H)[:len(all_names)]
    with np.errstate(divide="ignore", invalid="ignore"):
        ce = estimate_covariance(cov, jacobian=-np.eye(len(all_names)),
                                 components={"choices": -sc @ Hinv.T,
                                             "transitions": -corr @ Hinv.T},
                                 units=np.arange(problem.n_units), parameters=all_names,
                                 small_sample=small_sample)
    diag = np.diag(ce.cov)
    if not np.all(np.isfinite(diag)) or np.any(diag <= 0):
        raise EstimationError("the covariance is not positive definite at the estimate; the "
                              "types are not identified in this sample.")
    pi, share_se = _shares_and_errors(mix, best.eta, ce.cov)
    small = [k for k in range(K) if pi[k] - 1.959964 * share_se[k] <= 0]
    if small:
        warnings.warn(
            f"type {small[0] + 1}'s share is {pi[small[0]]:.3f} (s.e. {share_se[small[0]]:.3f}): "
            f"its Wald interval reaches 0, so the data hardly support {K} types; compare the "
            f"fit with {K - 1} (log-likelihood, starts agreeing) before reading the types.",
            OrthoCCPWarning, stacklevel=2)
    labels = panel.unit_labels
    details = TypesDetails(
        n_types=K, type_shifts=tuple(str(problem.choices[j]) for j in shifts),
        type_slopes=tuple(problem.parameters[c] for c in slopes), ccp_update=ccp_update,
        share_covariates=covariates,
        em_iterations=best.em_iterations, em_converged=best.em_converged,
        newton_steps=best.newton_steps, loglik=L,
        starts=int(starts), starts_agreeing=agree, starts_failed=failed,
        shares=tuple(float(v) for v in pi), share_errors=tuple(float(v) for v in share_se),
        n_states=problem.space.n_states,
        posteriors=pd.DataFrame(q, index=pd.Index(labels, name="unit"),
                                columns=[f"type{k + 1}" for k in range(K)]),
        ccp=pd.DataFrame(P, columns=label_index(problem.choices), index=pd.MultiIndex.from_product(
            [range(1, K + 1), range(problem.space.n_states)], names=["type", "state"])))
    index = label_index(all_names, "parameter")
    return TypesResults(
        params=pd.Series(best.eta, index=index, name="estimate"),
        std_errors=pd.Series(np.sqrt(diag), index=index, name="std_error"),
        cov=pd.DataFrame(ce.cov, index=index, columns=index), debiased=False,
        model={"kind": "types", "discount": problem.discount, "n_types": K},
        seed=seed, cov_type=cov, small_sample=bool(small_sample), n_units=problem.n_units,
        accounting=RowAccounting(n_rows=panel.n_rows, n_moment_rows=panel.n_rows,
                                 n_corrected=0, n_terminal=0, excluded={},
                                 dropped=dict(panel.dropped_rows)),
        decomposition=ce.decomposition, influence=ce.influence,
        influence_units=np.asarray(ce.cluster_labels(labels)), details=details,
        timings={"first_step_s": t_first, "estimation_s": t_est,
                 "total_s": time.perf_counter() - t_start}, version=__version__)
