"""Full-solution maximum likelihood (nested fixed point, Rust 1987) for discrete states.

A benchmark for orthoccp's CCP estimator, not a second estimator of the package: it needs the
state to be discrete, it solves the model at every trial parameter, and its transitions are
cell frequencies or an increment pmf estimated in a first step.

Outer loop: Newton's method (scipy's ``trust-exact``) on the average log-likelihood with the
analytic gradient and Hessian, both through the implicit function theorem. Inner loop:
:func:`~orthoccp.reference.solve_bellman` (successive approximations, then
Newton--Kantorovich steps) to sup-norm 1e-12, warm-started from the previous trial's value.
"""

from __future__ import annotations

import json
import time
from collections.abc import Hashable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np
import pandas as pd
from scipy import optimize, stats
from scipy.linalg import lu_factor, lu_solve

from .._errors import EstimationError, InputError
from .._options import check_option
from .._labels import find_label, match_keys, match_label, show_label, show_labels
from .._version import __version__
from ..results import estimates_block, json_number, param_records
from ._bellman import BellmanSolution, _newton_matrix, blas_limit, solve_bellman
from ._transitions import TransitionEstimate, estimate_transitions

__all__ = ["LoglikEvaluation", "NFXPProblem", "NFXPResults", "nfxp_estimate"]

CONSTANT = "1"
"""Utility regressor name that stands for a constant (as in :class:`orthoccp.Model`)."""


@dataclass(frozen=True, eq=False)
class LoglikEvaluation:
    """The log-likelihood and its derivatives at one parameter vector.

    Attributes
    ----------
    loglik : float
        :math:`\\ell(\\theta) = \\sum_{s,j} n_{sj} \\ln P_j(s; \\theta)`.
    gradient : numpy.ndarray
        (p,) :math:`\\partial \\ell / \\partial \\theta`.
    hessian : numpy.ndarray or None
        (p, p) :math:`\\partial^2 \\ell / \\partial \\theta \\partial \\theta'`.
    cell_scores : numpy.ndarray
        (S, J, p) :math:`\\partial \\ln P_j(s) / \\partial \\theta`, the score of one
        observation of choice j in state s.
    solution : BellmanSolution
        The solved model at :math:`\\theta`.
    """

    loglik: float
    gradient: np.ndarray
    hessian: np.ndarray | None
    cell_scores: np.ndarray
    solution: BellmanSolution


@dataclass(frozen=True, eq=False)
class NFXPProblem:
    """The data reduced to what the likelihood needs: counts, design, transitions.

    Parameters
    ----------
    design : numpy.ndarray
        (S, J, p) regressors: :math:`u_j(s) = \\sum_k \\theta_k Z_{jk}(s)`.
    transitions : numpy.ndarray
        (J, S, S) row-stochastic :math:`F_j`, held fixed (first-step estimates).
    discount : float
        :math:`\\beta`.
    counts : numpy.ndarray
        (S, J) number of observations choosing j in state s.
    parameters : tuple of str
        Names of :math:`\\theta`'s entries.
    choices : tuple
        Choice labels (the J axis).
    tol : float, default=1e-12
        Bellman residual tolerance of every solve.
    blas_threads : int or None, default=1
        BLAS threads in :meth:`evaluate` (see :func:`~orthoccp.reference.solve_bellman`).

    Notes
    -----
    The (partial) log-likelihood of the choices given the states is

    .. math::

        \\ell(\\theta) = \\sum_{s,j} n_{sj} \\ln P_j(s;\\theta), \\qquad
        \\ln P_j = v_j - \\ln \\textstyle\\sum_k e^{v_k},

    with :math:`v_j = u_j + \\beta F_j V_\\theta` and :math:`V_\\theta` the fixed point.
    With :math:`g_j = \\partial \\ln P_j / \\partial\\theta = \\dot v_j - \\sum_k P_k \\dot v_k`,
    :math:`\\dot v_j = Z_j + \\beta F_j \\dot V`, :math:`\\dot V = A^{-1} \\sum_j P_j Z_j`,
    :math:`A = I - \\beta F^P` (implicit function theorem), the Hessian of one observation is

    .. math::

        \\partial^2 \\ln P_j = \\ddot v_j - \\sum_k P_k \\ddot v_k - \\sum_k P_k g_k g_k',
        \\qquad \\ddot v_j = \\beta F_j \\ddot V, \\quad
        \\ddot V = A^{-1} \\sum_j P_j\\, g_j \\dot v_j',

    using :math:`\\partial P_j / \\partial \\theta = P_j g_j` and that utilities are linear in
    :math:`\\theta`.
    """

    design: np.ndarray
    transitions: np.ndarray
    discount: float
    counts: np.ndarray
    parameters: tuple[str, ...]
    choices: tuple[Hashable, ...]
    tol: float = 1e-12
    blas_threads: int | None = 1

    @property
    def n_obs(self) -> int:
        """Observations (rows) in the likelihood."""
        return int(self.counts.sum())

    def utility(self, theta: np.ndarray) -> np.ndarray:
        """(S, J) flow utilities :math:`Z\\theta`."""
        return self.design @ np.asarray(theta, dtype=np.float64)

    def solve(self, theta: np.ndarray, *, value0: np.ndarray | None = None) -> BellmanSolution:
        """Solve the Bellman equation at ``theta`` (to sup-norm :attr:`tol`)."""
        return solve_bellman(
            self.utility(theta), self.transitions, self.discount, value0=value0, tol=self.tol,
            blas_threads=self.blas_threads,
        )

    def evaluate(
        self,
        theta: np.ndarray,
        *,
        value0: np.ndarray | None = None,
        hessian: bool = True,
    ) -> LoglikEvaluation:
        """Log-likelihood, analytic gradient, and optionally the analytic Hessian.

        Parameters
        ----------
        theta : numpy.ndarray
            (p,) parameters.
        value0 : numpy.ndarray, optional
            Warm start of the Bellman solve.
        hessian : bool, default=True
            Also compute the Hessian (one more linear solve with p^2 right-hand sides).
        """
        with blas_limit(self.blas_threads):
            return self._evaluate(np.asarray(theta, dtype=np.float64), value0, hessian)

    def _evaluate(
        self, theta: np.ndarray, value0: np.ndarray | None, hessian: bool
    ) -> LoglikEvaluation:
        sol = solve_bellman(
            self.utility(theta), self.transitions, self.discount, value0=value0, tol=self.tol,
            blas_threads=None,
        )
        P, Z, F, beta, n = sol.ccp, self.design, self.transitions, self.discount, self.counts
        lu = lu_factor(_newton_matrix(P, F, beta))
        dV = lu_solve(lu, np.einsum("sj,sjk->sk", P, Z))
        dv = Z + beta * np.einsum("jst,tk->sjk", F, dV)
        g = dv - np.einsum("sj,sjk->sk", P, dv)[:, None, :]
        ll = float(np.sum(n * sol.log_ccp))
        grad = np.einsum("sj,sjk->k", n, g)
        H = None
        if hessian:
            p = Z.shape[2]
            rhs = np.einsum("sj,sja,sjb->sab", P, dv, g).reshape(-1, p * p)
            ddV = lu_solve(lu, rhs)
            ddv = beta * np.einsum("jst,tc->sjc", F, ddV)
            dd_centered = ddv - np.einsum("sj,sjc->sc", P, ddv)[:, None, :]
            n_s = n.sum(axis=1)
            H = np.einsum("sj,sjc->c", n, dd_centered).reshape(p, p)
            H -= np.einsum("s,sj,sja,sjb->ab", n_s, P, g, g)
            H = 0.5 * (H + H.T)
        return LoglikEvaluation(loglik=ll, gradient=grad, hessian=H, cell_scores=g, solution=sol)

    def loglik(self, theta: np.ndarray) -> float:
        """:math:`\\ell(\\theta)`."""
        return self.evaluate(theta, hessian=False).loglik

    def gradient(self, theta: np.ndarray) -> np.ndarray:
        """Analytic :math:`\\partial \\ell / \\partial \\theta` (implicit function theorem)."""
        return self.evaluate(theta, hessian=False).gradient

    def opg(self, evaluation: LoglikEvaluation) -> np.ndarray:
        """Outer product of the per-observation scores, :math:`\\sum_{s,j} n_{sj} g_j g_j'`."""
        g = evaluation.cell_scores
        return np.einsum("sj,sja,sjb->ab", self.counts, g, g)


@dataclass(frozen=True, eq=False)
class NFXPResults:
    """Result of :func:`nfxp_estimate`.

    Attributes
    ----------
    params : pandas.Series
        Maximum-likelihood estimates.
    std_errors : pandas.Series
        Standard errors, conditional on the first-step transitions (see ``cov_type``).
    cov : pandas.DataFrame
        Covariance matrix of ``params``.
    cov_type : str
        ``"hessian"``: inverse of the observed information :math:`-\\nabla^2 \\ell`;
        ``"opg"``: inverse of the outer product of the per-observation scores (BHHH).
    loglik : float
        Log-likelihood of the choices at the estimate.
    iterations : int
        Outer (Newton) iterations.
    inner : dict
        Bellman solves, successive-approximation steps and Newton--Kantorovich steps summed
        over the outer loop.
    seconds : float
        Wall time of the whole call (transitions, optimisation, covariance).
    converged : bool
        Whether the optimiser met its gradient tolerance.
    message : str
        The optimiser's message.
    gradient : numpy.ndarray
        Score at the estimate.
    n_obs, n_units, n_states : int
        Observations in the likelihood, units, states.
    ccp : pandas.DataFrame
        (S, J) choice probabilities at the estimate.
    value : numpy.ndarray
        (S,) ex-ante value at the estimate.
    transitions : TransitionEstimate
        The first step.
    problem : NFXPProblem
        The reduced problem (for profiling the likelihood or checking derivatives).
    """

    params: pd.Series
    std_errors: pd.Series
    cov: pd.DataFrame
    cov_type: str
    loglik: float
    iterations: int
    inner: dict[str, int]
    seconds: float
    converged: bool
    message: str
    gradient: np.ndarray
    n_obs: int
    n_units: int
    n_states: int
    ccp: pd.DataFrame
    value: np.ndarray
    transitions: TransitionEstimate
    problem: NFXPProblem
    timings: dict[str, float] = field(default_factory=dict)

    def conf_int(self, level: float = 0.95) -> pd.DataFrame:
        """Wald intervals :math:`\\hat\\theta \\pm z_{(1+level)/2}\\,\\mathrm{se}`."""
        if not 0 < level < 1:
            raise InputError(f"level must be in (0, 1), got {level!r}.")
        z = float(stats.norm.ppf(0.5 + level / 2))
        return pd.DataFrame(
            {"lower": self.params - z * self.std_errors, "upper": self.params + z * self.std_errors}
        )

    def to_dict(self, level: float = 0.95) -> dict[str, Any]:
        """JSON-safe dictionary (NaN and infinities become ``None``).

        ``params`` has the layout of :meth:`orthoccp.Results.to_dict`'s.
        """
        return {
            "params": param_records(self.to_frame(level)),
            "level": level,
            "method": "nfxp",
            "cov_type": self.cov_type,
            "cov": [[json_number(v) for v in row] for row in self.cov.to_numpy()],
            "n_units": self.n_units,
            "n_obs": self.n_obs,
            "n_states": self.n_states,
            "loglik": json_number(self.loglik),
            "converged": bool(self.converged),
            "iterations": int(self.iterations),
            "transitions": self.transitions.method,
            "version": __version__,
        }

    def to_json(self, level: float = 0.95, **kwargs: Any) -> str:
        """:meth:`to_dict` serialised (``allow_nan=False``: never writes NaN)."""
        return json.dumps(self.to_dict(level), allow_nan=False, **kwargs)

    def to_frame(self, level: float = 0.95) -> pd.DataFrame:
        """Tidy table: one row per parameter (the columns of :meth:`orthoccp.Results.to_frame`)."""
        ci = self.conf_int(level)
        z = self.params / self.std_errors
        return pd.DataFrame({
            "estimate": self.params, "std_error": self.std_errors, "z": z,
            "p_value": 2 * stats.norm.sf(np.abs(z)), "ci_lower": ci["lower"],
            "ci_upper": ci["upper"],
        }).rename_axis("parameter")

    def summary(self, level: float = 0.95) -> str:
        """A plain-text table of estimates (the one layout of every summary) and fit information."""
        lines = estimates_block(["Nested fixed point MLE (Rust 1987): full-solution benchmark"],
                                self.to_frame(level), level)
        lines += [
            f"observations {self.n_obs}   units {self.n_units}   states {self.n_states}   "
            f"log-likelihood {self.loglik:.4f}",
            f"transitions: {self.transitions.method} (standard errors condition on them)   "
            f"cov: {self.cov_type}",
            f"outer iterations {self.iterations}   Bellman solves {self.inner['solves']}   "
            f"converged {self.converged}   {self.seconds:.3f} s",
        ]
        return "\n".join(lines)


def _state_codes(values: pd.Series, name: str) -> np.ndarray:
    if values.isna().any():
        raise InputError(f"state column {name!r} has {int(values.isna().sum())} missing values.")
    arr = pd.to_numeric(values, errors="coerce").to_numpy(dtype=np.float64)
    if np.isnan(arr).any() or np.any(arr != np.round(arr)) or arr.min() < 0:
        raise InputError(
            f"state column {name!r} must hold state indices 0..S-1 (non-negative integers); "
            f"recode the discrete state first (e.g. with pd.factorize)."
        )
    return arr.astype(np.int64)


def _design(
    frame: pd.DataFrame,
    s: np.ndarray,
    utility: Mapping[Any, Mapping[str, Any]],
    choices: tuple[Hashable, ...],
    S: int,
    state: str,
) -> tuple[np.ndarray, tuple[str, ...]]:
    names: list[str] = []
    for spec in utility.values():
        if not isinstance(spec, Mapping):
            raise InputError(f"utility must map choices to {{parameter: regressor}}, got {spec!r}.")
        for name in spec:
            if not isinstance(name, str) or not name:
                raise InputError(f"bad parameter name {name!r} in utility.")
            if name not in names:
                names.append(name)
    if not names:
        raise InputError("utility declares no parameters.")
    Z = np.zeros((S, len(choices), len(names)))
    seen = np.bincount(s, minlength=S) > 0
    positions = match_keys(utility, choices, role="utility choice")
    for label, spec in utility.items():
        j = positions[label]
        for name, reg in spec.items():
            k = names.index(name)
            if isinstance(reg, str):
                if reg == CONSTANT:
                    Z[:, j, k] = 1.0
                    continue
                if reg not in frame.columns:
                    raise InputError(f"utility column {reg!r} (of {name!r}) is not in the data.")
                col = pd.to_numeric(frame[reg], errors="coerce").to_numpy(dtype=np.float64)
                if not np.all(np.isfinite(col)):
                    raise InputError(f"utility column {reg!r} has missing or non-numeric values.")
                lo = np.full(S, np.inf)
                hi = np.full(S, -np.inf)
                np.minimum.at(lo, s, col)
                np.maximum.at(hi, s, col)
                if np.any(hi[seen] - lo[seen] > 1e-12 * np.maximum(1.0, np.abs(hi[seen]))):
                    raise InputError(
                        f"utility column {reg!r} varies within a value of state {state!r}; a "
                        f"full-solution model needs regressors that are functions of the state."
                    )
                if not seen.all():
                    raise InputError(
                        f"utility column {reg!r} gives no value at {int((~seen).sum())} of the "
                        f"{S} states (never observed); pass the regressor as a per-state array "
                        f"of length {S} instead."
                    )
                Z[:, j, k] = lo
            else:
                arr = np.asarray(reg, dtype=np.float64)
                if arr.shape != (S,):
                    raise InputError(
                        f"utility[{label!r}][{name!r}] must be a column name, '1' or an array of "
                        f"length S = {S} (one value per state), got shape {arr.shape}."
                    )
                if not np.all(np.isfinite(arr)):
                    raise InputError(f"utility[{label!r}][{name!r}] has non-finite values.")
                Z[:, j, k] = arr
    return Z, tuple(names)


def _check_identified(Z: np.ndarray, counts: np.ndarray, names: tuple[str, ...]) -> None:
    seen = counts.sum(axis=1) > 0
    D = np.vstack([Z[seen, j, :] - Z[seen, 0, :] for j in range(1, Z.shape[1])])
    if np.linalg.matrix_rank(D) < len(names):
        raise InputError(
            f"parameters {', '.join(names)} are not all identified: their utility regressors "
            f"do not vary across choices independently (e.g. a constant under every choice)."
        )


def _n_states(
    n_states: int | None,
    utility: Mapping[Any, Mapping[str, Any]],
    transitions: Any,
    observed_max: int,
) -> int:
    candidates: list[int] = []
    for spec in utility.values():
        if isinstance(spec, Mapping):
            for reg in spec.values():
                if not isinstance(reg, str):
                    candidates.append(int(np.asarray(reg).shape[0]) if np.ndim(reg) else -1)
    if isinstance(transitions, Mapping):
        candidates.extend(int(np.asarray(m).shape[0]) for m in transitions.values())
    if n_states is not None:
        if isinstance(n_states, bool) or not isinstance(n_states, (int, np.integer)) or n_states < 1:
            raise InputError(f"n_states must be a positive integer, got {n_states!r}.")
        S = int(n_states)
    elif candidates:
        S = candidates[0]
    else:
        S = observed_max + 1
    if any(c != S for c in candidates):
        raise InputError(
            f"per-state arrays and transition matrices disagree on the number of states "
            f"(sizes {sorted(set(candidates))}, n_states {S}); pass n_states= and arrays of "
            f"that length."
        )
    if observed_max >= S:
        raise InputError(
            f"the state column holds index {observed_max}, beyond n_states - 1 = {S - 1}."
        )
    return S


def nfxp_estimate(
    data: pd.DataFrame,
    *,
    state: str,
    choice: str,
    unit: str,
    period: str,
    choices: Sequence[Hashable],
    anchor: Hashable | None,
    utility: Mapping[Any, Mapping[str, Any]],
    discount: float,
    transitions: Literal["frequency", "increments"] | Mapping[Any, Any] = "frequency",
    n_states: int | None = None,
    start: Mapping[str, float] | Sequence[float] | None = None,
    reset_state: int = 0,
    max_increment: int | None = None,
    cov: Literal["hessian", "opg"] = "hessian",
    tol: float = 1e-12,
    gtol: float = 1e-9,
    maxiter: int = 100,
    blas_threads: int | None = 1,
) -> NFXPResults:
    """Full-solution (nested fixed point) maximum likelihood for a discrete-state model.

    A benchmark tool for orthoccp's CCP estimator: it solves the dynamic programme at every
    trial parameter, which is exact but costly and needs a discrete state.

    Parameters
    ----------
    data : pandas.DataFrame
        One row per unit and period.
    state : str
        Column of state indices 0..S-1 (the whole state; recode discrete states to one index).
    choice, unit, period : str
        Columns of the chosen alternative, the decision maker and the integer period.
    choices : sequence
        All choice labels, fixing the order of every J axis.
    anchor : hashable or None
        The renewal choice, after which the next state's distribution does not depend on the
        current state (its transition row is pooled over states with ``"frequency"``, and
        counted from ``reset_state`` with ``"increments"``); None if there is none. It plays
        no role in the likelihood itself.
    utility : mapping
        Choice label -> {parameter: regressor}; a regressor is ``"1"`` (constant), a data column
        that is a function of the state, or an array of length S (one value per state).
        :math:`u_j(s) = \\sum_k \\theta_k Z_{jk}(s)`; choices left out have zero utility.
    discount : float
        Known :math:`\\beta \\in [0, 1)`.
    transitions : {"frequency", "increments"} or mapping, default="frequency"
        First step: cell frequencies of the next state given state and choice; a pmf of state
        increments shared by all states (Rust 1987's :math:`\\theta_3`); or a mapping choice ->
        given (S, S) matrix (see :func:`orthoccp.reference.estimate_transitions`).
    n_states : int, optional
        S; by default the length of the per-state arrays or matrices, else the largest
        observed state index + 1.
    start : mapping or sequence, optional
        Starting parameters (default zeros).
    reset_state : int, default=0
        Where the renewal choice resets the state before the increment (``"increments"``).
    max_increment : int, optional
        Largest increment (``"increments"``); default the largest observed.
    cov : {"hessian", "opg"}, default="hessian"
        Inverse observed information (negative analytic Hessian) or inverse outer product of
        the per-observation scores (BHHH).
    tol : float, default=1e-12
        Sup-norm tolerance of every Bellman solve.
    gtol : float, default=1e-9
        Stop when the sup-norm of the gradient of the average log-likelihood is below this.
    maxiter : int, default=100
        Outer iterations.
    blas_threads : int or None, default=1
        BLAS threads while the model is solved (``threadpoolctl``); one thread is fastest for
        the small dense systems of a few hundred states, and several threads slowed the solve
        about tenfold on a 2-core machine shared with other processes. None leaves the
        setting alone.

    Returns
    -------
    NFXPResults

    Notes
    -----
    Two-step estimation as in Rust (1987): the transitions are estimated first and then held
    fixed while :math:`\\theta` maximises the likelihood of the choices,
    :math:`\\ell(\\theta) = \\sum_{i,t} \\ln P_{a_{it}}(x_{it};\\theta)`, over all rows (the last
    period's choices included). The standard errors condition on the estimated transitions,
    the usual two-step practice (Rust 1987); they omit the first step's sampling noise. The
    outer loop is Newton's method with a trust region (``scipy.optimize.minimize``,
    ``method="trust-exact"``) on :math:`-\\ell/N` with the analytic gradient and Hessian of
    :class:`NFXPProblem`; every evaluation solves the Bellman equation to ``tol``
    (:func:`~orthoccp.reference.solve_bellman`, warm-started from the previous evaluation).

    References
    ----------
    Rust, J. (1987). Optimal replacement of GMC bus engines: an empirical model of Harold
    Zurcher. Econometrica 55(5), 999--1033.
    Su, C.-L. and Judd, K. L. (2012). Constrained optimization approaches to estimation of
    structural models. Econometrica 80(5), 2213--2230.

    Examples
    --------
    >>> from orthoccp.reference import SU_JUDD_BUS, nfxp_estimate, simulate_bus
    >>> df = simulate_bus(buses=60, periods=60, seed=3)
    >>> res = nfxp_estimate(df, state="mileage", choice="action", unit="bus", period="month",
    ...                     choices=("keep", "replace"), anchor="replace",
    ...                     utility=SU_JUDD_BUS.utility_spec(), discount=0.975,
    ...                     transitions="increments")
    >>> list(res.params.index), res.converged
    (['theta11', 'RC'], True)
    """
    t_start = time.perf_counter()
    if not isinstance(data, pd.DataFrame) or len(data) == 0:
        raise InputError("data must be a non-empty pandas DataFrame.")
    for role, col in (("state", state), ("choice", choice), ("unit", unit), ("period", period)):
        if not isinstance(col, str) or col not in data.columns:
            raise InputError(f"{role} column {col!r} is not in the data.")
    choices = tuple(choices)
    if len(choices) < 2 or len(set(map(str, choices))) != len(choices):
        raise InputError(f"choices must list at least two distinct labels, got {choices!r}.")
    beta = check_option("discount", discount)
    if cov not in ("hessian", "opg"):
        raise InputError(f"cov must be 'hessian' or 'opg', got {cov!r}.")
    if not isinstance(utility, Mapping) or not utility:
        raise InputError("utility must map at least one choice to {parameter: regressor}.")

    frame = data.sort_values([unit, period], kind="mergesort").reset_index(drop=True)
    if frame.duplicated([unit, period]).any():
        raise InputError("some unit-period pairs appear more than once.")
    s = _state_codes(frame[state], state)
    codes, observed = pd.factorize(frame[choice])
    to_choice = np.empty(len(observed) + 1, dtype=np.int64)
    to_choice[-1] = -1  # a missing label (code -1)
    for k, label in enumerate(observed):
        hit = find_label(label, choices, role="observed choice")
        to_choice[k] = -1 if hit is None else hit
    a = to_choice[codes]
    if (a < 0).any():
        bad = frame[choice].to_numpy()[a < 0][0]
        raise InputError(
            f"choice {show_label(bad)} in column {choice!r} is not one of choices "
            f"({show_labels(choices)})."
        )
    per = pd.to_numeric(frame[period], errors="coerce").to_numpy(dtype=np.float64)
    if np.isnan(per).any():
        raise InputError(f"period column {period!r} must be numeric.")
    unit_codes = pd.factorize(frame[unit])[0]
    linked = np.zeros(len(frame), dtype=bool)
    linked[:-1] = (unit_codes[1:] == unit_codes[:-1]) & (per[1:] == per[:-1] + 1)
    rows = np.flatnonzero(linked)

    S = _n_states(n_states, utility, transitions, int(s.max()))
    J = len(choices)
    anchor_j = None if anchor is None else match_label(anchor, choices, role="anchor")
    Z, names = _design(frame, s, utility, choices, S, state)
    counts = np.zeros((S, J))
    np.add.at(counts, (s, a), 1.0)
    _check_identified(Z, counts, names)

    t0 = time.perf_counter()
    if isinstance(transitions, Mapping) or transitions in ("frequency", "increments"):
        trans = estimate_transitions(
            s[rows], a[rows], s[rows + 1], n_states=S, choices=choices, method=transitions,
            anchor=anchor_j, reset_state=reset_state, max_increment=max_increment,
        )
    else:
        raise InputError(
            f"transitions must be 'frequency', 'increments' or a mapping choice -> (S, S) "
            f"matrix, got {transitions!r}."
        )
    t_trans = time.perf_counter() - t0

    problem = NFXPProblem(
        design=Z, transitions=trans.matrices, discount=beta, counts=counts,
        parameters=names, choices=choices, tol=float(tol), blas_threads=blas_threads,
    )
    theta0 = _start(start, names)

    N = problem.n_obs
    cache: dict[str, Any] = {"key": None, "value": None}
    inner = {"solves": 0, "contraction": 0, "newton": 0}

    def evaluate(theta: np.ndarray) -> LoglikEvaluation:
        key = np.asarray(theta, dtype=np.float64).tobytes()
        if cache["key"] != key:
            ev = problem.evaluate(theta, value0=cache["value"])
            inner["solves"] += 1
            inner["contraction"] += ev.solution.contraction_steps
            inner["newton"] += ev.solution.newton_steps
            cache.update(key=key, ev=ev, value=ev.solution.value)
        return cache["ev"]  # type: ignore[no-any-return]

    def fun(theta: np.ndarray) -> tuple[float, np.ndarray]:
        ev = evaluate(theta)
        return -ev.loglik / N, -ev.gradient / N

    def hess(theta: np.ndarray) -> np.ndarray:
        ev = evaluate(theta)
        assert ev.hessian is not None
        return -ev.hessian / N

    t1 = time.perf_counter()
    with blas_limit(blas_threads):
        opt = optimize.minimize(
            fun, theta0, jac=True, hess=hess, method="trust-exact",
            options={"gtol": float(gtol), "maxiter": int(maxiter)},
        )
        theta = np.asarray(opt.x, dtype=np.float64)
        ev = evaluate(theta)
    t_opt = time.perf_counter() - t1
    grad_norm = float(np.max(np.abs(ev.gradient / N)))
    converged = bool(opt.success) or grad_norm < gtol

    info = problem.opg(ev) if cov == "opg" else -np.asarray(ev.hessian)
    try:
        V = np.linalg.inv(info)
    except np.linalg.LinAlgError as exc:
        raise EstimationError(
            f"the {cov} information matrix is singular at the estimate; the parameters are "
            f"not identified in this sample."
        ) from exc
    se = np.sqrt(np.diag(V))
    if not np.all(np.isfinite(se)) or np.any(np.diag(V) <= 0):
        raise EstimationError(
            f"the {cov} covariance is not positive definite at the estimate (converged="
            f"{converged}, gradient sup-norm {grad_norm:.3g})."
        )
    index = pd.Index(names, name="parameter")
    return NFXPResults(
        params=pd.Series(theta, index=index, name="estimate"),
        std_errors=pd.Series(se, index=index, name="std_error"),
        cov=pd.DataFrame(V, index=index, columns=index),
        cov_type=cov,
        loglik=ev.loglik,
        iterations=int(opt.nit),
        inner=dict(inner),
        seconds=time.perf_counter() - t_start,
        converged=converged,
        message=str(opt.message),
        gradient=ev.gradient,
        n_obs=N,
        n_units=int(unit_codes.max()) + 1,
        n_states=S,
        ccp=pd.DataFrame(ev.solution.ccp, columns=list(choices)),
        value=ev.solution.value,
        transitions=trans,
        problem=problem,
        timings={"transitions_s": t_trans, "optimization_s": t_opt,
                 "total_s": time.perf_counter() - t_start},
    )


def _start(start: Mapping[str, float] | Sequence[float] | None, names: tuple[str, ...]) -> np.ndarray:
    p = len(names)
    if start is None:
        return np.zeros(p)
    if isinstance(start, Mapping):
        unknown = set(start) - set(names)
        if unknown:
            raise InputError(
                f"start names unknown parameter(s) {sorted(unknown)}; parameters: {list(names)}."
            )
        return np.array([float(start.get(k, 0.0)) for k in names])
    arr = np.asarray(start, dtype=np.float64)
    if arr.shape != (p,) or not np.all(np.isfinite(arr)):
        raise InputError(f"start must have {p} finite values ({list(names)}), got {start!r}.")
    return arr
