r"""Two-step pseudo-likelihood and NPL estimation of the entry-exit game (discrete states).

The first stage is a logit of each firm's action on its state (firm-specific intercept, market
size, own last action, the number of rivals active last period, and size times own last
action). Given CCPs :math:`P`, the value difference of being active is
:math:`\tilde z_i(x; P)\theta + \tilde e_i(x; P)` (:func:`value_terms`), so the
pseudo-likelihood is a logit with offset :math:`\tilde e` (Aguirregabiria & Mira 2007):

* two-step: :math:`\hat\theta = \arg\max_\theta \sum_r \ln \Lambda(\pm(\tilde z_r \theta +
  \tilde e_r))` at the first stage's :math:`\hat P`. Its influence terms add to the pseudo
  score :math:`s_r = (a_r - \Lambda_r)\tilde z_r` the first stage's:
  :math:`-G_\gamma H_\gamma^{-1} f_r (a_r - \hat P_r)`, with :math:`G_\gamma` the derivative of
  the summed score in the first-stage coefficients and :math:`H_\gamma` the first-stage
  Hessian.
* NPL: :math:`P \leftarrow \Psi(\hat\theta, P)` and re-estimate, to the fixed point
  :math:`\hat P = \Psi(\hat\theta, \hat P)`. The fixed point no longer depends on the first
  stage, so its influence terms are the pseudo scores alone, with the Jacobian
  :math:`G_\theta + G_P (I - \Psi_P)^{-1}\Psi_\theta` (the total derivative along the fixed
  point; Aguirregabiria & Mira 2007, Proposition 2). It needs an equilibrium that is stable
  under :math:`\Psi` (spectral radius of :math:`\Psi_P` below 1; Kasahara & Shimotsu 2012):
  otherwise the two-step estimate is reported, with a warning.

Standard errors are clustered by market and condition on the market-size transition (given,
or estimated by frequencies).
"""

from __future__ import annotations

import time
import warnings
from collections.abc import Hashable
from dataclasses import dataclass, field
from typing import Any, ClassVar

import numpy as np
import pandas as pd
from scipy.sparse import linalg as sparse_linalg

from .._errors import EstimationError, InputError, OrthoCCPWarning
from .._labels import show_label
from .._options import check_option
from .._version import __version__
from ..covariance import check_cov_name, estimate_covariance
from ..results import Details, Results, RowAccounting, covariance_line, variance_share_lines
from ._design import EntryGame
from ..discrete._pseudo import newton_pseudo
from ._equilibrium import best_response, psi_radius, value_terms

__all__ = ["GameDetails", "GameResults", "estimate_game"]

GAME_ASSUMPTIONS = (
    "private type-I extreme-value (logit) shocks, i.i.d. across firms, choices and periods",
    "known discount factor",
    "Markov strategies; the data come from one equilibrium, the same in every market",
    "the market size is exogenous and Markov; payoffs are those of the entry-exit game",
    "NPL: the equilibrium is stable under best responses (spectral radius below 1)",
)


@dataclass(frozen=True, eq=False)
class GameDetails(Details):
    """Details of :func:`estimate_game`.

    Attributes
    ----------
    estimator : {"two-step", "npl"}
        The estimator reported.
    requested : str
        The estimator asked for (``"npl"`` falls back to ``"two-step"`` when NPL does not
        converge or the equilibrium is unstable; ``fallback`` says why).
    iterations : int
        NPL iterations (1 for two-step).
    last_change : float
        Sup-norm change of the CCPs in the last NPL iteration.
    spectral_radius : float
        Of :math:`\\partial\\Psi/\\partial P` at the estimate.
    loglik : float
        Pseudo-log-likelihood at the estimate.
    first_stage : str
        The first stage's description.
    n_markets, n_firms, n_states : int
    fallback : str
        Why NPL was not reported ("" when it was).
    ccp : pandas.DataFrame or None
        (S, N) the CCPs the reported estimate's pseudo-likelihood used (at NPL's fixed point,
        :math:`\\hat P = \\Psi(\\hat\\theta, \\hat P)`); None when reloaded from JSON.
    """

    kind: ClassVar[str] = "game"
    assumptions: ClassVar[tuple[str, ...]] = GAME_ASSUMPTIONS

    estimator: str
    requested: str
    iterations: int
    last_change: float
    spectral_radius: float
    loglik: float
    first_stage: str
    n_markets: int
    n_firms: int
    n_states: int
    fallback: str = ""
    ccp: pd.DataFrame | None = field(default=None, repr=False)

    def method(self, debiased: bool) -> str:
        if self.estimator == "npl":
            return "nested pseudo-likelihood (NPL) for games, Aguirregabiria & Mira (2007)"
        return "two-step pseudo-likelihood for games, Aguirregabiria & Mira (2007)"

    def title(self, res: Results) -> str:
        return (f"model: entry game, {self.n_firms} firms, {self.n_states} states, discount "
                f"{res.model['discount']}")

    def lines(self, res: Results, *, plugin: bool) -> list[str]:
        lines = [f"markets {self.n_markets}; {res.accounting.describe()}",
                 f"first stage: {self.first_stage}; pseudo-log-likelihood {self.loglik:.4f}"]
        if self.estimator == "npl":
            lines.append(f"NPL iterations {self.iterations}; last sup-norm CCP change "
                         f"{self.last_change:.3g}")
        if self.fallback:
            lines.append(f"requested {self.requested}: {self.fallback}")
        lines.append(f"spectral radius of the best-response mapping at the estimate "
                     f"{self.spectral_radius:.3f}")
        lines.append(covariance_line(res.cov_type, res.small_sample).replace("by unit",
                                                                             "by market")
                     + "; conditional on the market-size transition")
        lines.extend(variance_share_lines(
            res.decomposition, "variance shares (choices: pseudo-score, first_stage: the "
            "first stage's noise):"))
        return lines

    def to_dict(self) -> dict[str, Any]:
        return {"kind": self.kind, "estimator": self.estimator, "requested": self.requested,
                "iterations": self.iterations, "last_change": self.last_change,
                "spectral_radius": self.spectral_radius, "loglik": self.loglik,
                "first_stage": self.first_stage, "n_markets": self.n_markets,
                "n_firms": self.n_firms, "n_states": self.n_states, "fallback": self.fallback}

    @classmethod
    def from_dict(cls, doc: Any, *, index: pd.Index, std_errors: pd.Series) -> GameDetails:
        return cls(**{k: doc[k] for k in (
            "estimator", "requested", "iterations", "last_change", "spectral_radius", "loglik",
            "first_stage", "n_markets", "n_firms", "n_states", "fallback")})


@dataclass(frozen=True, eq=False)
class GameResults(Results):
    """:class:`~orthoccp.Results` of :func:`estimate_game` (clustered by market)."""

    details: GameDetails


# --------------------------------------------------------------------------- data
@dataclass(frozen=True, eq=False)
class _GameData:
    structure: EntryGame
    state: np.ndarray  # (R,) state of each firm-row
    firm: np.ndarray  # (R,) firm index
    action: np.ndarray  # (R,) 0/1
    market: np.ndarray  # (R,) market code
    markets: np.ndarray  # market labels
    firms: tuple[Hashable, ...]


def _bind(data: Any, *, market: str, period: str, firm: str, action: str, size: str,
          last: str, discount: float, size_transition: Any) -> _GameData:
    if not isinstance(data, pd.DataFrame):
        raise InputError(f"data must be a pandas DataFrame, got {type(data).__name__}.")
    cols = {"market": market, "period": period, "firm": firm, "action": action, "size": size,
            "last": last}
    missing = [f"{k}={v!r}" for k, v in cols.items() if v not in data.columns]
    if missing:
        raise InputError(f"data has no column {', '.join(missing)}; its columns are "
                         f"{', '.join(map(str, data.columns))}.")
    df = data[list(cols.values())]
    if df.isna().any().any():
        bad = df.columns[df.isna().any()].tolist()
        raise InputError(f"columns {bad} have missing values; drop or fill those rows first.")
    for key in ("action", "last"):
        values = set(pd.unique(df[cols[key]]).tolist())
        if not values <= {0, 1}:
            raise InputError(f"column {cols[key]!r} must hold 0 (inactive) or 1 (active), "
                             f"got {sorted(values, key=str)[:5]}.")
    firms = tuple(sorted(pd.unique(df[firm]).tolist(), key=str))
    N = len(firms)
    levels = np.sort(pd.unique(df[size]).astype(np.float64))
    counts = df.groupby([market, period]).size()
    if (counts != N).any():
        where = counts[counts != N].index[0]
        raise InputError(
            f"every market and period needs one row per firm ({N} firms); market "
            f"{show_label(where[0])}, period {show_label(where[1])} has "
            f"{int(counts[counts != N].iloc[0])}.")
    sizes = df.groupby([market, period])[size].nunique()
    if (sizes > 1).any():
        raise InputError(f"column {size!r} must be the same for every firm of a market and "
                         f"period (the market size).")
    df = df.sort_values([market, period, firm], kind="stable")
    firm_idx = pd.Categorical(df[firm], categories=list(firms)).codes.astype(np.int64)
    size_idx = np.searchsorted(levels, df[size].to_numpy(dtype=np.float64))
    # the state's last actions: every firm's `last` in the same market and period
    last_bits = (df[last].to_numpy(dtype=np.int64) << firm_idx).reshape(-1, N).sum(axis=1)
    state = np.repeat(size_idx.reshape(-1, N)[:, 0] * 2 ** N + last_bits, N)
    if size_transition is None:
        F = _size_frequencies(df, market=market, period=period, size_idx=size_idx, N=N,
                              L=levels.size)
    else:
        F = np.asarray(size_transition, dtype=np.float64)
        if F.shape != (levels.size, levels.size):
            raise InputError(f"size_transition must be ({levels.size}, {levels.size}), one row "
                             f"per observed size level, got {F.shape}.")
    # the game's structure (firms, states, size chain, discount); its payoff parameters are
    # what is estimated, and value_terms does not read them
    structure = EntryGame(fixed_costs=np.zeros(N), theta_rs=0.0, theta_ec=0.0, theta_rn=0.0,
                          discount=float(discount), size_transition=F, size_values=levels,
                          name="estimated game")
    codes, labels = pd.factorize(df[market], sort=True)
    return _GameData(structure=structure, state=state, firm=firm_idx,
                     action=df[action].to_numpy(dtype=np.int64), market=codes.astype(np.int64),
                     markets=np.asarray(labels, dtype=object), firms=firms)


def _size_frequencies(df: pd.DataFrame, *, market: str, period: str, size_idx: np.ndarray,
                      N: int, L: int) -> np.ndarray:
    per = df.iloc[::N]
    s = size_idx[::N]
    m = per[market].to_numpy()
    t = per[period].to_numpy()
    linked = (m[1:] == m[:-1]) & (t[1:] == t[:-1] + 1)
    if not linked.any():
        raise InputError("no market is observed in two consecutive periods, so the size "
                         "transition cannot be estimated; pass size_transition=.")
    F = np.zeros((L, L))
    np.add.at(F, (s[:-1][linked], s[1:][linked]), 1.0)
    rows = F.sum(axis=1)
    if (rows == 0).any():
        raise InputError(f"size levels {np.flatnonzero(rows == 0).tolist()} (positions) are never "
                         f"followed by an observed next period; pass size_transition=.")
    return F / rows[:, None]


# --------------------------------------------------------------------------- pieces
def _features(structure: EntryGame) -> np.ndarray:
    """(N, S, 5N) the first stage's regressors of each firm at each state."""
    N, S = structure.n_firms, structure.n_states
    level, last = structure.state_parts()
    f = np.zeros((N, S, 5 * N))
    for i in range(N):
        own = last[:, i].astype(np.float64)
        rivals = last.sum(axis=1) - last[:, i]
        f[i, :, 5 * i: 5 * i + 5] = np.column_stack([np.ones(S), level, own, rivals, level * own])
    return f


def _cell_counts(d: _GameData) -> np.ndarray:
    """(N*S, 2) inactive and active rows per firm-state cell (cell = firm * S + state)."""
    S = d.structure.n_states
    cell = d.firm * S + d.state
    size = d.structure.n_firms * S
    active = np.bincount(cell, weights=d.action, minlength=size)
    return np.column_stack([np.bincount(cell, minlength=size) - active, active])


def _logit(z: np.ndarray, e: np.ndarray, counts: np.ndarray, names: tuple[str, ...]) -> np.ndarray:
    """The binary logit with offset over firm-state cells, maximised by the discrete-state
    estimators' pseudo-likelihood Newton solver (``z``: (cells, K), ``e``: (cells,))."""
    Zt = np.stack([np.zeros_like(z), z], axis=1)
    et = np.column_stack([np.zeros_like(e), e])
    return newton_pseudo(Zt, et, counts, None, names=names)[0]


def _pieces(d: _GameData, P: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per firm-row, the regressors z~ and offset e~ of the pseudo-likelihood at ``P``."""
    vt = value_terms(d.structure, P)
    return vt.zt[d.firm, d.state], vt.et[d.firm, d.state]


def _total_score(d: _GameData, P: np.ndarray, theta: np.ndarray) -> np.ndarray:
    zt, et = _pieces(d, P)
    lam = 1.0 / (1.0 + np.exp(-(zt @ theta + et)))
    return zt.T @ (d.action - lam)


def estimate_game(
    data: pd.DataFrame,
    *,
    discount: float,
    market: str = "market",
    period: str = "period",
    firm: str = "firm",
    action: str = "active",
    size: str = "size",
    last: str = "last_active",
    estimator: str = "npl",
    size_transition: Any = None,
    max_iterations: int = 200,
    tol: float = 1e-8,
    cov: str = "clustered",
    small_sample: bool = True,
) -> GameResults:
    r"""Estimate the entry-exit game by two-step pseudo-likelihood or NPL.

    Parameters
    ----------
    data : pandas.DataFrame
        One row per firm, market and period (every firm in every market-period), with the
        columns named below.
    discount : float
        :math:`\beta`, known.
    market, period, firm, action, size, last : str
        Column names: market and period labels, the firm's label, its action (1 active, 0
        not), the market size level (a number; the same for every firm of a market-period)
        and the firm's action in the previous period (the state).
    estimator : {"npl", "two-step"}, default="npl"
        NPL falls back to two-step, with a warning, when it does not converge within
        ``max_iterations`` or the best-response mapping is unstable at the estimate.
    size_transition : array, optional
        (L, L) transition of the size levels (in increasing order); estimated by frequencies
        over consecutive periods when not given.
    max_iterations : int, default=200
        NPL iterations.
    tol : float, default=1e-8
        NPL stops when the sup-norm change of the CCPs is below ``tol``.
    cov : {"clustered", "heteroskedastic"}, default="clustered"
        Cluster by market, or treat firm-rows as independent.
    small_sample : bool, default=True
        Multiply the covariance by G/(G-1).

    Returns
    -------
    GameResults
        Parameters ``fc_<firm>``, ``rs``, ``ec``, ``rn`` of the payoff of being active
        :math:`\theta_{FC,i} + \theta_{RS} s - \theta_{EC}(1 - a_{i,t-1})
        - \theta_{RN}\ln(1 + N_{-i,t})`; details in :class:`GameDetails`.

    References
    ----------
    Aguirregabiria & Mira (2007) Econometrica 75; Kasahara & Shimotsu (2012) Econometrica 80.
    """
    t_start = time.perf_counter()
    if estimator not in ("npl", "two-step"):
        raise InputError(f"estimator must be 'npl' or 'two-step', got {estimator!r}.")
    check_option("discount", discount)
    check_option("small_sample", small_sample)
    check_cov_name(cov)
    d = _bind(data, market=market, period=period, firm=firm, action=action, size=size,
              last=last, discount=discount, size_transition=size_transition)
    st = d.structure
    N, S = st.n_firms, st.n_states
    # first stage
    feats = _features(st)
    f_rows = feats[d.firm, d.state]
    counts = _cell_counts(d)
    names = tuple(f"fc_{f}" for f in d.firms) + ("rs", "ec", "rn")
    flat = feats.reshape(N * S, -1)
    gamma = _logit(flat, np.zeros(N * S), counts,
                   tuple(f"first stage {k}" for k in range(flat.shape[1])))

    def second(P: np.ndarray) -> np.ndarray:
        vt = value_terms(st, P)
        return _logit(vt.zt.reshape(N * S, -1), vt.et.reshape(N * S), counts, names)

    def ccp_of(g: np.ndarray) -> np.ndarray:
        return 1.0 / (1.0 + np.exp(-np.einsum("nsk,k->sn", feats, g)))

    P0 = np.clip(ccp_of(gamma), 1e-10, 1 - 1e-10)
    theta = second(P0)
    two_step = (theta, P0)
    # NPL
    P, iterations, change, fallback = P0, 1, np.nan, ""
    if estimator == "npl":
        for iterations in range(1, int(max_iterations) + 1):
            new = np.clip(best_response(st, P, theta), 1e-12, 1 - 1e-12)
            change = float(np.max(np.abs(new - P)))
            P = new
            theta = second(P)
            if change < tol:
                break
        if not change < tol:
            fallback = (f"NPL did not converge in {max_iterations} iterations (last change "
                        f"{change:.3g}); the two-step estimate is reported")
    radius = psi_radius(st, P, theta)
    if estimator == "npl" and not fallback and radius >= 1:
        fallback = (f"the best-response mapping is unstable at the NPL estimate (spectral "
                    f"radius {radius:.3f} >= 1), so NPL need not be consistent; the two-step "
                    f"estimate is reported")
    if fallback:
        warnings.warn(fallback + ".", OrthoCCPWarning, stacklevel=2)
        theta, P = two_step
        radius = psi_radius(st, P, theta)
    reported = "npl" if estimator == "npl" and not fallback else "two-step"
    zt, et = _pieces(d, P)
    lam = 1.0 / (1.0 + np.exp(-(zt @ theta + et)))
    score = zt * (d.action - lam)[:, None]
    G_theta = -(zt * (lam * (1 - lam))[:, None]).T @ zt
    components = {"choices": score}
    if reported == "npl":
        jacobian = G_theta + _fixed_point_term(d, P, theta)
    else:
        jacobian = G_theta
        p_rows = P[d.state, d.firm]
        H_gamma = -(f_rows * (p_rows * (1 - p_rows))[:, None]).T @ f_rows
        G_gamma = np.empty((theta.size, gamma.size))
        for k in range(gamma.size):
            h = 1e-5
            e = np.zeros_like(gamma)
            e[k] = h
            G_gamma[:, k] = (_total_score(d, ccp_of(gamma + e), theta)
                             - _total_score(d, ccp_of(gamma - e), theta)) / (2 * h)
        s_gamma = f_rows * (d.action - p_rows)[:, None]
        components["first_stage"] = -s_gamma @ np.linalg.solve(H_gamma, G_gamma.T)
    ce = estimate_covariance(cov, jacobian=jacobian, components=components, units=d.market,
                             parameters=names, small_sample=bool(small_sample))
    se = np.sqrt(np.diag(ce.cov))
    index = pd.Index(names, name="parameter")
    v = zt @ theta + et
    loglik = float(np.sum(d.action * v - np.logaddexp(0.0, v)))
    details = GameDetails(
        estimator=reported, requested=estimator, iterations=int(iterations),
        last_change=float(change), spectral_radius=float(radius), loglik=loglik,
        first_stage="logit of the action on firm x (1, size, own last action, rivals active "
                    "last period, size x own last action)",
        n_markets=int(d.markets.size), n_firms=N, n_states=S, fallback=fallback,
        ccp=pd.DataFrame(P, columns=pd.Index([str(f) for f in d.firms], name="firm"),
                         index=pd.RangeIndex(S, name="state")))
    n_rows = int(d.action.size)
    return GameResults(
        params=pd.Series(theta, index=index, name="estimate"),
        std_errors=pd.Series(se, index=index, name="std_error"),
        cov=pd.DataFrame(ce.cov, index=index, columns=index), debiased=False,
        model={"kind": "entry game", "discount": float(discount),
               "firms": [str(f) for f in d.firms],
               "size_transition": st.size_transition.tolist()},
        seed=0, cov_type=cov, small_sample=bool(small_sample), n_units=int(d.markets.size),
        accounting=RowAccounting(n_rows=n_rows, n_moment_rows=n_rows, n_corrected=0,
                                 n_terminal=0, excluded={}),
        decomposition=ce.decomposition, influence=ce.influence,
        influence_units=ce.cluster_labels(d.markets), details=details,
        timings={"total_s": time.perf_counter() - t_start}, version=__version__,
    )


def _fixed_point_term(d: _GameData, P: np.ndarray, theta: np.ndarray) -> np.ndarray:
    r""":math:`G_P (I - \Psi_P)^{-1} \Psi_\theta`: how the summed score moves with
    :math:`\theta` through the NPL fixed point :math:`P = \Psi(\theta, P)`."""
    st = d.structure
    S, N = P.shape
    vt = value_terms(st, P)
    v = np.einsum("nsk,k->sn", vt.zt, theta) + vt.et.T
    lam = 1.0 / (1.0 + np.exp(-v))
    psi_theta = (lam * (1 - lam)).T[:, :, None] * vt.zt  # (N, S, K)
    psi_theta = psi_theta.reshape(N * S, -1)  # firm-major, like the vectors below
    h = 1e-6 * float(min(P.min(), (1 - P).min(), 0.01)) / 0.01

    def jvp(x: np.ndarray) -> np.ndarray:
        dP = np.asarray(x).reshape(N, S).T
        up, down = best_response(st, P + h * dP, theta), best_response(st, P - h * dP, theta)
        return x - ((up - down).T.ravel() / (2 * h))

    op = sparse_linalg.LinearOperator((N * S, N * S), matvec=jvp, dtype=np.float64)
    out = np.empty((theta.size, theta.size))
    for k in range(theta.size):
        dPdk, info = sparse_linalg.gmres(op, psi_theta[:, k], rtol=1e-7, atol=0.0,
                                         maxiter=500)
        if info != 0:
            raise EstimationError("the NPL variance: (I - Psi_P) x = Psi_theta did not solve; "
                                  "the equilibrium may be unstable.")
        dP = dPdk.reshape(N, S).T
        out[:, k] = (_total_score(d, P + h * dP, theta) - _total_score(d, P - h * dP, theta)) / (2 * h)
    return out
