"""Pseudo-likelihood and NPL estimation on a finite state space (Aguirregabiria & Mira 2002)."""

from __future__ import annotations

import time
import warnings
from collections.abc import Hashable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
import pandas as pd
from scipy import sparse

from .._arrays import label_index
from .._errors import EstimationError, InputError, OrthoCCPWarning
from .._options import check_option
from .._version import __version__
from ..covariance import CovarianceEstimate, check_cov_name, estimate_covariance
from ..data import Panel
from ..nuisance import clip_probabilities
from ..results import RowAccounting
from ._forward import default_horizon, simulate_continuation
from ._inversion import InversionTerms, PolicySystem, inversion_terms
from ._pseudo import PseudoFit, cell_logit, newton_pseudo, pseudo_fit
from ._results import DiscreteDetails, DiscreteResults, transition_record
from ._smooth import classifier_ccp, sieve_ccp
from ._states import StateSpace, state_space, utility_design
from ._transitions import TransitionMatrices, estimate_transition_matrices

__all__ = ["DiscreteProblem", "build_problem", "estimate_discrete"]


@dataclass(frozen=True, eq=False)
class DiscreteProblem:
    """A panel reduced to what the discrete estimators need.

    Attributes
    ----------
    design : numpy.ndarray
        (S, J, p) flow-utility design.
    transitions : TransitionMatrices
        First-step transition matrices.
    discount : float
        :math:`\\beta`.
    counts : numpy.ndarray
        (S, J) choice counts over all rows.
    parameters : tuple of str
    choices : tuple
        Choice labels (the J axis), as in the panel.
    row_state, row_choice, row_unit : numpy.ndarray
        Each row's state code, choice position and unit code.
    n_units : int
    space : StateSpace
    """

    design: np.ndarray
    transitions: TransitionMatrices
    discount: float
    counts: np.ndarray
    parameters: tuple[str, ...]
    choices: tuple[Hashable, ...]
    row_state: np.ndarray
    row_choice: np.ndarray
    row_unit: np.ndarray
    n_units: int
    space: StateSpace

    @property
    def mats(self) -> tuple[sparse.csr_matrix, ...]:
        return self.transitions.matrices


def build_problem(
    panel: Panel,
    *,
    utility: Mapping[Hashable, Mapping[str, Any]],
    discount: float,
    n_states: int | None = None,
    transitions: str | Mapping[Any, Any] = "frequency",
    smoothing: float = 0.0,
    reset_choices: Sequence[Hashable] = (),
    reset_state: int = 0,
    increment_range: tuple[int, int] | None = None,
    base: Mapping[Any, Any] | None = None,
) -> DiscreteProblem:
    """Code the states, build the per-state design and estimate the transitions.

    See :func:`estimate_discrete` for the parameters.
    """
    if not isinstance(panel, Panel):
        raise InputError(f"panel must be an orthoccp.Panel, got {type(panel).__name__}.")
    beta = check_option("discount", discount)
    choices = tuple(panel.choices)
    J = len(choices)
    if J < 2:
        raise InputError(
            f"only one choice ({choices[0]!r}) is observed in column {panel.choice!r}; a "
            f"discrete choice model needs at least two."
        )
    space = state_space(panel, n_states=n_states)
    Z, names = utility_design(panel, space, utility, choices)
    _check_identified(Z, space, names)
    s, a = space.codes, panel.choice_codes
    counts = np.bincount(s * J + a, minlength=space.n_states * J).reshape(space.n_states, J)
    counts = counts.astype(np.float64)
    rows = np.flatnonzero(panel.next_row >= 0)
    if beta == 0.0 and not isinstance(transitions, Mapping):
        eye = sparse.identity(space.n_states, format="csr")
        tm = TransitionMatrices(matrices=tuple(eye for _ in range(J)), method="unused (discount 0)")
    else:
        tm = estimate_transition_matrices(
            s[rows], a[rows], s[panel.next_row[rows]], n_states=space.n_states, choices=choices,
            method=transitions, smoothing=smoothing, reset_choices=reset_choices,
            reset_state=reset_state, increment_range=increment_range, base=base,
            unit=panel.unit_codes[rows],
        )
    return DiscreteProblem(
        design=Z, transitions=tm, discount=beta, counts=counts, parameters=names,
        choices=choices, row_state=s, row_choice=a, row_unit=panel.unit_codes,
        n_units=panel.n_units, space=space,
    )


def _check_identified(Z: np.ndarray, space: StateSpace, names: tuple[str, ...]) -> None:
    seen = space.observed
    D = np.vstack([Z[seen, j, :] - Z[seen, 0, :] for j in range(1, Z.shape[1])])
    if np.linalg.matrix_rank(D) < len(names):
        raise InputError(
            f"parameters {', '.join(names)} are not all identified: their utility regressors "
            f"do not vary across choices independently over the observed states (e.g. a "
            f"constant under every choice). Drop a parameter or let it enter some choices only."
        )


def _initial_ccp(problem: DiscreteProblem, initial: Any, clip: float, degree: int,
                 seed: int) -> tuple[np.ndarray, np.ndarray, str]:
    """Starting CCPs (clipped), the clip mask and a label for the summary."""
    counts = problem.counts
    S, J = counts.shape
    if isinstance(initial, str):
        if initial == "frequency":
            n_s = counts.sum(axis=1, keepdims=True)
            shares = counts.sum(axis=0) / counts.sum()
            P = np.where(n_s > 0, counts / np.maximum(n_s, 1.0), shares[None, :])
            label = "cell frequencies (initial CCPs)"
        elif initial == "sieve":
            P = sieve_ccp(problem.space, counts, degree)
            label = f"logit sieve of degree {degree} (initial CCPs)"
        else:
            raise InputError(
                f"initial_ccp must be 'frequency', 'sieve', an (S, J) array or a "
                f"scikit-learn-style classifier, got {initial!r}."
            )
    elif isinstance(initial, (np.ndarray, list, tuple, pd.DataFrame)):
        P = np.asarray(initial, dtype=np.float64)
        if P.shape != (S, J) or not np.all(np.isfinite(P)) or (P < 0).any() \
                or np.max(np.abs(P.sum(axis=1) - 1)) > 1e-8:
            raise InputError(
                f"initial_ccp must be 'frequency', 'sieve', a classifier or an (S, J) = "
                f"({S}, {J}) array of probabilities with rows summing to one."
            )
        label = "given (initial CCPs)"
    else:
        P = classifier_ccp(problem.space, problem.row_choice, J, initial, seed=seed)
        label = f"{type(initial).__name__} (initial CCPs)"
    P, hit = clip_probabilities(P, clip)
    return P, hit, label


def _check_options(
    estimator: str, values: str, max_iterations: int, tol: float, clip: float, cov: str,
    steps: int,
) -> None:
    if estimator not in ("npl", "pml"):
        raise InputError(f"estimator must be 'npl' or 'pml', got {estimator!r}.")
    if values not in ("inversion", "simulation"):
        raise InputError(f"values must be 'inversion' or 'simulation', got {values!r}.")
    if values == "simulation" and estimator == "npl":
        raise InputError(
            "values='simulation' needs estimator='pml' (a fixed number of steps): simulated "
            "values jump as the CCPs change (each draw picks a discrete state), so NPL's rule "
            "'stop when the CCPs stop changing' need not be met. Use estimator='pml', steps=K."
        )
    for name, v, lo in (("max_iterations", max_iterations, 1), ("steps", steps, 1)):
        if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < lo:
            raise InputError(f"{name} must be an integer >= {lo}, got {v!r}.")
    if not isinstance(tol, (int, float)) or not 0 < tol < 1:
        raise InputError(f"tol must be a number in (0, 1), got {tol!r}.")
    check_option("clip", clip)
    check_cov_name(cov)


def estimate_discrete(
    panel: Panel,
    *,
    utility: Mapping[Hashable, Mapping[str, Any]],
    discount: float,
    estimator: Literal["npl", "pml"] = "npl",
    values: Literal["inversion", "simulation"] = "inversion",
    n_states: int | None = None,
    transitions: str | Mapping[Any, Any] = "frequency",
    smoothing: float = 0.0,
    reset_choices: Sequence[Hashable] = (),
    reset_state: int = 0,
    increment_range: tuple[int, int] | None = None,
    base: Mapping[Any, Any] | None = None,
    initial_ccp: Any = "frequency",
    sieve_degree: int = 3,
    clip: float = 1e-4,
    start: Mapping[str, float] | None = None,
    steps: int = 1,
    max_iterations: int = 100,
    tol: float = 1e-10,
    n_paths: int = 200,
    horizon: int | None = None,
    seed: int = 0,
    cov: str = "clustered",
    small_sample: bool = True,
    transition_noise: bool = True,
) -> DiscreteResults:
    """Pseudo-likelihood and NPL estimation of a dynamic logit model with discrete states.

    Parameters
    ----------
    panel : Panel
        The data; the distinct combinations of its state columns are the states (or one
        column of integer codes with ``n_states``).
    utility : mapping
        Choice label -> {parameter: regressor}; a regressor is ``"1"``, a data column that
        is a function of the state, or an array of S values (see
        :func:`~orthoccp.discrete.utility_design`). Every observed choice is listed, a choice
        with zero utility as an empty mapping.
    discount : float
        Known :math:`\\beta \\in [0, 1)`.
    estimator : {"npl", "pml"}, default="npl"
        ``"npl"`` iterates CCP -> :math:`\\theta` -> model-implied CCP until the CCPs stop
        changing; ``"pml"`` takes ``steps`` pseudo-likelihood steps from the initial CCPs
        (``steps=1``: the two-step Hotz--Miller estimator).
    values : {"inversion", "simulation"}, default="inversion"
        How the continuation values are computed: full Hotz--Miller inversion (a sparse
        linear solve), or forward simulation (Hotz, Miller, Sanders & Smith 1994).
    n_states : int, optional
        With one state column of integer codes 0..n_states-1 (see :func:`state_space`).
    transitions : {"frequency", "increments"} or mapping, default="frequency"
        The first step (see :func:`estimate_transition_matrices`).
    smoothing : float, default=0.0
        Pseudo-observations toward the pooled next-state distribution (``"frequency"``).
    reset_choices : sequence, default=()
        Choices after which the next state does not depend on the current one.
    reset_state : int, default=0
        Restart state of a reset choice (``"increments"``).
    increment_range : (int, int), optional
        Smallest and largest increment (``"increments"``; default the observed range).
    base : mapping, optional
        Choice -> (S,) base states of the increments (``"increments"``; default the state,
        or ``reset_state`` after a reset choice).
    initial_ccp : {"frequency", "sieve"}, numpy.ndarray or classifier, default="frequency"
        Starting CCPs. ``"frequency"``: cell frequencies (states no row occupies get the
        sample's choice shares). ``"sieve"``: a multinomial logit of the choice on Legendre
        polynomials of each numeric state column up to ``sieve_degree`` (indicators for other
        columns), fitted to the rows (:func:`~orthoccp.discrete._smooth.sieve_ccp`); it
        borrows strength across neighbouring states and removes most of the finite-sample
        bias of ``"pml"`` from frequencies (``benchmarks/npl_reference.py``). A
        scikit-learn-style classifier: fitted to the rows' state values and choices (a clone
        seeded from ``seed``), then predicted at every state. Or an (S, J) array.
    sieve_degree : int, default=3
        Highest polynomial degree per numeric state column of ``initial_ccp="sieve"`` (capped
        at the column's distinct values minus one).
    clip : float, default=1e-4
        The initial CCPs are clipped to [clip, 1 - clip] and renormalised (their logarithms
        enter the inversion). The model-implied CCPs of later iterations are not clipped.
    start : mapping, optional
        Starting parameters of the first pseudo-likelihood maximisation (default: zero or the
        minimum logit chi-square estimate, whichever has the larger pseudo-likelihood; the
        maximiser is the same, only the number of Newton steps differs).
    steps : int, default=1
        Pseudo-likelihood steps for ``estimator="pml"``.
    max_iterations : int, default=100
        Cap on NPL iterations.
    tol : float, default=1e-10
        NPL stops when the sup-norm change of the CCPs is below ``tol``. After its first
        iteration NPL takes one Newton step on the pseudo-likelihood per iteration and
        maximises it fully once the CCPs have settled: the fixed point is the same as with a
        full maximisation every iteration, at fewer Newton steps.
    n_paths : int, default=200
        Forward simulation: paths per state and choice.
    horizon : int, optional
        Forward simulation: periods simulated; default the smallest T with
        :math:`\\beta^T \\le 10^{-6}`.
    seed : int, default=0
        Seeds the forward simulation and a classifier given as ``initial_ccp``. The same
        seed gives the same draws in every iteration and for every :math:`\\theta` (common
        random numbers).
    cov : {"clustered", "heteroskedastic"}, default="clustered"
        Sum the influence terms by unit (decision maker), or treat rows as independent.
    small_sample : bool, default=True
        Multiply the covariance by G/(G-1) (G clusters), as every estimator does by default
        (the shared option ``small_sample``); False gives the textbook sandwich that
        maximum-likelihood references report.
    transition_noise : bool, default=True
        Add the transition estimate's sampling noise to the covariance.

    Returns
    -------
    DiscreteResults

    Notes
    -----
    Given CCPs :math:`P`, the Hotz--Miller inversion
    :math:`W(P) = (I - \\beta F^P)^{-1} \\sum_j P_j (u_j + \\gamma_E - \\ln P_j)` is linear in
    :math:`\\theta`, so the choice values :math:`\\tilde v_j = Z_j\\theta + \\beta F_j W(P)` are
    :math:`\\tilde Z_j(P)'\\theta + \\tilde e_j(P)` and the pseudo-likelihood
    :math:`Q(\\theta, P) = \\sum_{s,j} n_{sj} \\ln \\Lambda_j(\\tilde v(s))` is a conditional logit.
    NPL (Aguirregabiria & Mira 2002) alternates :math:`\\theta_k = \\arg\\max Q(\\theta, P_{k-1})`
    and :math:`P_k = \\Lambda(\\tilde v(\\theta_k, P_{k-1}))`; its fixed point is the
    maximum-likelihood estimate given the transitions.

    *Standard errors (the zero-Jacobian argument).* At a fixed point :math:`P = \\Psi(\\theta, P)`
    the map :math:`\\Psi` has zero Jacobian in :math:`P` (it is a policy-iteration step of a
    logit model; Aguirregabiria & Mira 2002, Proposition 2). Hence
    :math:`\\partial W / \\partial\\theta' = (I - \\beta F^P)^{-1} \\sum_j P_j Z_j`, which is
    exactly :math:`\\tilde Z`'s inversion term: the pseudo-score of every observation equals
    its full-likelihood score, and the estimation of :math:`P` adds nothing to the
    first-order variance. The covariance is the sandwich

    .. math::

        \\hat V = c\\, I^{-1} \\Big(\\sum_i \\phi_i \\phi_i'\\Big) I^{-1}, \\quad
        I = \\sum_s n_s \\sum_j \\Lambda_j g_j g_j', \\quad
        \\phi_i = \\sum_{t \\in i} g_{a_{it}}(s_{it}) + c_i,

    with :math:`g_j = \\tilde Z_j - \\sum_k \\Lambda_k \\tilde Z_k` and :math:`c_i` the
    first-order effect of unit i's transitions on the score through :math:`\\hat F`
    (two-step estimation, Newey & McFadden 1994, Theorem 6.1):
    :math:`c_i = -\\beta \\sum_{s,k} \\omega_k(s) (D^{(i)}_k V)(s)`,
    :math:`\\omega_k = n_s \\Lambda_k g_k + \\beta P_k \\mu`,
    :math:`\\mu = (I - \\beta F^P)^{-\\prime} \\sum_j F_j' (n \\Lambda_j g_j)`, with
    :math:`P` the CCPs the inversion used (:math:`P = \\Lambda` at NPL's fixed point), where
    :math:`D^{(i)}` is unit i's influence on :math:`\\hat F`
    (:meth:`TransitionMatrices.directional`). The same formula holds for ``"pml"`` steps
    from :math:`\\sqrt{n}`-consistent CCPs (Aguirregabiria & Mira 2002, Proposition 4), with
    worse finite-sample behaviour. With forward simulation, the simulation noise of each
    state's simulated value adds
    :math:`I^{-1} \\sum_{s,j} (n_s \\Lambda_j g_j)(n_s \\Lambda_j g_j)' \\beta^2
    \\mathrm{Var}_{sim}(\\bar r_{sj}'(\\theta, 1)) I^{-1}`, since the paths are drawn
    independently of the data and across states and choices.

    References
    ----------
    Hotz, V. J. and Miller, R. A. (1993). Review of Economic Studies 60(3), 497--529.
    Hotz, V. J., Miller, R. A., Sanders, S. and Smith, J. (1994). A simulation estimator for
    dynamic models of discrete choice. Review of Economic Studies 61(2), 265--289.
    Aguirregabiria, V. and Mira, P. (2002). Econometrica 70(4), 1519--1543.
    Newey, W. K. and McFadden, D. (1994). Large sample estimation and hypothesis testing.
    Handbook of Econometrics 4, ch. 36.

    Examples
    --------
    >>> from orthoccp import Panel
    >>> from orthoccp.reference import SU_JUDD_BUS, simulate_bus
    >>> df = simulate_bus(buses=30, periods=60, seed=1)
    >>> panel = Panel(df, unit="bus", period="month", choice="action", states=["mileage"])
    >>> res = estimate_discrete(panel, utility=SU_JUDD_BUS.utility_spec(), discount=0.975,
    ...                         n_states=175, transitions="increments",
    ...                         reset_choices=["replace"])
    >>> res.converged, list(res.params.index)
    (True, ['theta11', 'RC'])
    """
    t_start = time.perf_counter()
    _check_options(estimator, values, max_iterations, tol, clip, cov, steps)
    check_option("small_sample", small_sample)
    if isinstance(sieve_degree, bool) or not isinstance(sieve_degree, (int, np.integer)) \
            or sieve_degree < 1:
        raise InputError(f"sieve_degree must be an integer >= 1, got {sieve_degree!r}.")
    problem = build_problem(
        panel, utility=utility, discount=discount, n_states=n_states, transitions=transitions,
        smoothing=smoothing, reset_choices=reset_choices, reset_state=reset_state,
        increment_range=increment_range, base=base,
    )
    t_first = time.perf_counter() - t_start
    P, hit, first_label = _initial_ccp(problem, initial_ccp, clip, sieve_degree, seed)
    t_ccp = time.perf_counter() - t_start - t_first
    names = problem.parameters
    theta = _start(start, names)
    T = default_horizon(problem.discount) if horizon is None else int(horizon)
    observed = np.flatnonzero(problem.space.observed)
    system = PolicySystem(problem.mats, problem.discount)

    def terms(ccp: np.ndarray) -> tuple[np.ndarray, np.ndarray, Any]:
        if values == "inversion" or problem.discount == 0.0:
            inv = inversion_terms(ccp, problem.design, problem.mats, problem.discount, system)
            return inv.Zt, inv.et, inv
        sim = simulate_continuation(
            ccp, problem.design, problem.mats, problem.discount, observed, n_paths=n_paths,
            horizon=T, seed=seed,
        )
        return sim.Zt, sim.et, sim

    limit = max_iterations if estimator == "npl" else steps
    changes: list[float] = []
    last_terms: Any = None
    P_used = P
    def implied(Zt: np.ndarray, et: np.ndarray, theta_hat: np.ndarray) -> np.ndarray:
        new = cell_logit(Zt, et, theta_hat)[0]  # the model-implied CCPs at this estimate
        if values == "simulation":
            keep = np.ones(new.shape[0], dtype=bool)
            keep[observed] = False
            new[keep] = P[keep]
        return new

    for iteration in range(limit):
        Zt, et, last_terms = terms(P)
        # NPL's inner maximisation may stop after one Newton step once it has a start: the
        # fixed point (the maximiser at the CCPs it implies) is the same, and the exact
        # maximiser is taken once the CCPs have settled. "pml" steps are exact maximisers.
        inexact = estimator == "npl" and iteration > 0
        theta_hat, n_steps = newton_pseudo(Zt, et, problem.counts, theta, names=names,
                                           max_steps=1 if inexact else None)
        new = implied(Zt, et, theta_hat)
        change = float(np.max(np.abs(new - P)))
        if inexact and (change < tol or iteration == limit - 1):
            # settled, or out of iterations: the returned estimate must maximise Q on its terms
            theta_hat, n_steps = newton_pseudo(Zt, et, problem.counts, theta_hat, names=names)
            new = implied(Zt, et, theta_hat)
            change = float(np.max(np.abs(new - P)))
        theta = theta_hat
        P_used = P
        changes.append(change)
        P = new
        if estimator == "npl" and changes[-1] < tol:
            break
    # scores, information and the identification check only at the last step's estimate
    fit = pseudo_fit(Zt, et, problem.counts, theta_hat, names=names, iterations=n_steps)
    converged = estimator != "npl" or changes[-1] < tol
    if not converged:
        warnings.warn(
            f"NPL did not converge in {max_iterations} iterations: the last sup-norm change of "
            f"the CCPs was {changes[-1]:.3g} (tol {tol:g}). Raise max_iterations, or check the "
            f"model (NPL can cycle when the fixed point is unstable).",
            OrthoCCPWarning, stacklevel=2,
        )
    t_est = time.perf_counter() - t_start - t_first - t_ccp
    cov_out = _covariance(problem, fit, P_used, last_terms, values == "simulation", cov,
                          small_sample, transition_noise)
    return _results(problem, panel, fit, P, last_terms, cov_out, estimator=estimator,
                    values=values, changes=changes, converged=converged, hit=hit, clip=clip,
                    learner=first_label,
                    seed=seed, cov=cov, small_sample=small_sample, n_paths=n_paths, horizon=T,
                    timings={"first_step_s": t_first, "initial_ccp_s": t_ccp,
                             "estimation_s": t_est,
                             "total_s": time.perf_counter() - t_start})


def _start(start: Mapping[str, float] | None, names: tuple[str, ...]) -> np.ndarray | None:
    if start is None:
        return None  # newton_pseudo picks zero or the chi-square start
    if not isinstance(start, Mapping):
        raise InputError(f"start must map parameter names to numbers, got {start!r}.")
    unknown = set(start) - set(names)
    if unknown:
        raise InputError(f"start names unknown parameter(s) {sorted(unknown)}; parameters: {list(names)}.")
    return np.array([float(start.get(k, 0.0)) for k in names])


def _covariance(
    problem: DiscreteProblem,
    fit: PseudoFit,
    ccp_used: np.ndarray,
    last_terms: Any,
    simulated: bool,
    cov: str,
    small_sample: bool,
    transition_noise: bool,
) -> CovarianceEstimate:
    """The sandwich of :func:`orthoccp.covariance.estimate_covariance` with two components,
    the choices' scores and the transition estimate's effect (each unit's, on its first row),
    plus the simulation noise of forward-simulated values as an added variance."""
    g, Lam, info = fit.scores, fit.ccp, fit.information
    S, J, p = g.shape
    beta = problem.discount
    n_s = problem.counts.sum(axis=1)
    # (n_rows, p) each row's score; a flat take is much faster than g[state, choice]
    row_scores = np.take(g.reshape(S * J, p), problem.row_state * J + problem.row_choice, axis=0)
    transitions = np.zeros_like(row_scores)
    if transition_noise and beta > 0 and problem.transitions.method in ("frequency", "increments"):
        inv = last_terms if isinstance(last_terms, InversionTerms) else inversion_terms(
            ccp_used, problem.design, problem.mats, beta)
        value = inv.Wz @ fit.theta + inv.We
        w = n_s[:, None, None] * Lam[:, :, None] * g  # (S, J, p)
        lam = sum(problem.mats[j].T @ w[:, j, :] for j in range(J))
        mu = inv.lu.solve(np.asarray(lam), trans="T")
        # dW/dF runs through I - beta F^P at the CCPs the inversion used (= Lam at NPL's fixed
        # point; the starting CCPs for "pml")
        omega = w + beta * ccp_used[:, :, None] * mu[:, None, :]
        per_unit = -beta * problem.transitions.directional(omega, value, problem.n_units)
        # each unit's transition effect on its first row: summed into the unit's cluster, or
        # that row's own when the rows are the clusters
        transitions[np.unique(problem.row_unit, return_index=True)[1]] = per_unit
    added = {}
    if simulated:
        sim = last_terms
        Iinv = np.linalg.inv(info)
        th1 = np.append(fit.theta, 1.0)
        var_cell = np.einsum("a,sjab,b->sj", th1, sim.mean_cov, th1) * beta**2
        h = n_s[:, None, None] * Lam[:, :, None] * g
        added["simulation"] = Iinv @ np.einsum("sj,sja,sjb->ab", var_cell, h, h) @ Iinv.T
    # the pseudo-likelihood's Jacobian is minus its information matrix
    with np.errstate(divide="ignore", invalid="ignore"):
        ce = estimate_covariance(
            cov, jacobian=-info, components={"choices": row_scores, "transitions": transitions},
            units=problem.row_unit, parameters=problem.parameters, small_sample=small_sample,
            added=added,
        )
    diag = np.diag(ce.cov)
    if not np.all(np.isfinite(diag)) or np.any(diag <= 0):
        raise EstimationError(
            "the covariance is not positive definite at the estimate; the parameters are not "
            "identified in this sample."
        )
    return ce


def _results(
    problem: DiscreteProblem,
    panel: Panel,
    fit: PseudoFit,
    ccp: np.ndarray,
    last_terms: Any,
    cv: CovarianceEstimate,
    *,
    estimator: str,
    values: str,
    changes: list[float],
    converged: bool,
    hit: np.ndarray,
    clip: float,
    learner: str,
    seed: int,
    cov: str,
    small_sample: bool,
    n_paths: int,
    horizon: int,
    timings: dict[str, float],
) -> DiscreteResults:
    index = label_index(problem.parameters, "parameter")
    se = np.sqrt(np.diag(cv.cov))
    n_linked = int((panel.next_row >= 0).sum())
    accounting = RowAccounting(
        n_rows=panel.n_rows, n_moment_rows=panel.n_rows, n_corrected=n_linked, n_terminal=0,
        excluded={}, dropped=dict(panel.dropped_rows),
    )
    observed = problem.space.observed
    clipped = {str(c): int(hit[observed, j].sum()) for j, c in enumerate(problem.choices)}
    value = (last_terms.Wz @ fit.theta + last_terms.We) if isinstance(last_terms, InversionTerms) \
        else np.empty(0)
    simulated = values == "simulation"
    details = DiscreteDetails(
        estimator=estimator, values=values, initial_ccp=learner, clip=float(clip),
        clipped=clipped, iterations=len(changes), converged=converged,
        last_change=changes[-1], changes=tuple(changes), loglik=fit.loglik,
        n_states=problem.space.n_states, n_paths=int(n_paths) if simulated else 0,
        horizon=int(horizon) if simulated else 0,
        transitions=transition_record(problem.transitions),
        ccp=pd.DataFrame(ccp, columns=label_index(problem.choices)), value=value,
        transition_matrices=problem.transitions, information=fit.information,
        influence_parts=cv.parts,
    )
    return DiscreteResults(
        params=pd.Series(fit.theta, index=index, name="estimate"),
        std_errors=pd.Series(se, index=index, name="std_error"),
        cov=pd.DataFrame(cv.cov, index=index, columns=index),
        debiased=True,
        model={"kind": "discrete", "discount": problem.discount, "estimator": estimator,
               "values": values},
        seed=int(seed), cov_type=cov, small_sample=bool(small_sample),
        n_units=panel.n_units, accounting=accounting, decomposition=cv.decomposition,
        influence=cv.influence, influence_units=np.asarray(cv.cluster_labels(panel.unit_labels)),
        details=details, timings=timings, version=__version__,
    )
