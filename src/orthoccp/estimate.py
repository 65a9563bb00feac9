"""The estimation pipeline: rows -> folds -> nuisances -> moments -> solve -> covariance -> results."""

from __future__ import annotations

import time
import warnings
from contextvars import ContextVar
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
import pandas as pd

from ._errors import EstimationError, InputError, OrthoCCPWarning
from ._labels import show_label
from ._options import check_option, check_options
from ._version import __version__
from .covariance import check_cov_name, estimate_covariance
from .anchor import check_anchor_probability
from .data import Panel
from .diagnostics import Diagnostics, compute_diagnostics
from .folds import unit_folds
from .backends import FeatureRows, resolve_backend
from .checks import warn_if_not_persistent, warn_if_not_reset
from ._random import stream
from .instruments import RobustPlan, persistent_feature_columns, plan_robust, renewal_robust_system
from .learners import resolve_learners
from .model import BoundModel, Model
from .moments import build_moment_system
from .pieces import MomentPieces
from .nuisance import Nuisances, clip_probabilities, crossfit_nuisances, refit_anchor_target
from .interval_checks import identification_strength, interval_check, unseen_variance
from .results import CrossFitDetails, Results, RowAccounting
from .solver import solve_orthogonal, solve_plugin

__all__ = ["estimate", "account_rows"]


def account_rows(bound: BoundModel) -> tuple[np.ndarray, np.ndarray, RowAccounting]:
    """Moment rows, their correction flags, and the row accounting.

    A row is a moment row when its unit's next period is observed (its next row enters the
    correction terms). In terminal models a row choosing the anchor needs no next row and is
    a moment row too, except in the panel's final period: there rows of the other choices
    cannot be used (their next period is censored), so dropping anchor rows as well keeps the
    censoring from selecting on the choice. With ``discount == 0`` every row is a moment row.
    """
    panel = bound.panel
    n = panel.n_rows
    nxt = panel.next_row
    codes = panel.choice_codes
    R = bound.anchor_index
    if not bound.has_next_stage:
        acc = RowAccounting(n, n, 0, 0, {}, dict(panel.dropped_rows))
        return np.arange(n), np.zeros(n, dtype=bool), acc
    linked = nxt >= 0
    is_last = ~linked & ~panel.gap_after
    if bound.model.kind == "terminal":
        after_exit = (codes == R) & (linked | panel.gap_after)
        if after_exit.any():
            i = int(np.flatnonzero(after_exit)[0])
            raise InputError(
                f"{int(after_exit.sum())} row(s) choose the terminal anchor "
                f"{show_label(panel.choices[R])} but the unit has later rows (e.g. {panel.unit}="
                f"{show_label(panel.frame[panel.unit].iloc[i])}, {panel.period}="
                f"{show_label(panel.periods[i])}); a "
                f"terminal choice must be a unit's last row."
            )
        final = panel.periods == panel.periods.max()
        terminal_rows = (codes == R) & ~final
        censored_exit = (codes == R) & final
    else:
        terminal_rows = np.zeros(n, dtype=bool)
        censored_exit = np.zeros(n, dtype=bool)
    use = linked | terminal_rows
    corrected = linked
    excluded = {
        "last observed period (no next row)": int((is_last & ~use & ~censored_exit).sum()),
        "gap before the next observed period": int((panel.gap_after & ~use).sum()),
    }
    if bound.model.kind == "terminal":
        excluded["terminal choice in the final period (censoring)"] = int(censored_exit.sum())
    rows = np.flatnonzero(use)
    acc = RowAccounting(
        n_rows=n,
        n_moment_rows=int(rows.size),
        n_corrected=int(corrected[rows].sum()),
        n_terminal=int(terminal_rows.sum()),
        excluded=excluded,
        dropped=dict(panel.dropped_rows),
    )
    if rows.size == 0:
        raise InputError(
            "no row can serve as a moment row: no unit is observed in two consecutive periods."
        )
    return rows, corrected[rows], acc


def _check_scheme(scheme: Any, folds: int) -> None:
    """The cross-fitting scheme, and the folds the nested one needs."""
    check_option("scheme", scheme)
    if scheme == "nested" and folds < 3:
        raise InputError(
            f"scheme='nested' needs folds >= 3 (it fits the CCP on folds outside each pair), got "
            f"folds={folds}; use more folds or scheme='plain'."
        )


def estimate(
    panel: Panel,
    model: Model,
    *,
    learner: Any = "lightgbm",
    regressor: Any = None,
    folds: int = 5,
    seed: int = 0,
    debias: bool = True,
    splits: int = 1,
    scheme: str = "nested",
    clip: float = 1e-4,
    cov: str = "clustered",
    small_sample: bool = True,
    moments: str | None = None,
    nuisances: Nuisances | None = None,
    model_ccp_steps: int = 0,
    correction_weights: str = "solution",
    backend: Any = None,
    n_jobs: int | None = None,
) -> Results:
    """Estimate a dynamic discrete choice model by cross-fitted, orthogonal CCP moments.

    Parameters
    ----------
    panel : Panel
        The data (see :class:`~orthoccp.Panel`).
    model : Model
        Choices, anchor, discount factor and flow utilities (see :class:`~orthoccp.Model`).
    learner : str or classifier, default="lightgbm"
        CCP learner: a registry name (``"lightgbm"``, ``"logit"``, ``"lasso_logit"``,
        ``"random_forest"``, ``"cell_frequency"`` for discrete or binned states) or any object
        with ``fit``/``predict_proba``. Cloned per fold.
    regressor : str or regressor, optional
        Continuation regressions; defaults to the registry partner of ``learner``.
    folds : int, default=5
        Cross-fitting folds K, by unit.
    seed : int, default=0
        Drives every fold split and every learner's ``random_state``, through named streams
        (:mod:`orthoccp._random`: folds, first stage, projections, model-implied steps, each
        per split), so the folds and first stage do not depend on the other options.
    debias : bool, default=True
        ``False`` gives the plug-in estimator with conventional (first-stage-naive) errors.
    splits : int, default=1
        Repeated cross-fitting: S fold splits, aggregated by the median.
    scheme : {"plain", "nested"}, default="nested"
        How the continuation regressions' ln P_R target is cross-fitted. ``"nested"`` costs
        K(K-1)/2 extra classifier fits; in the project's Monte Carlo it had lower bias and
        RMSE (``benchmarks/results/crossfit_schemes_ebike.json``).
    clip : float, default=1e-4
        CCPs are clipped to [clip, 1 - clip].
    cov : {"clustered", "heteroskedastic"}, default="clustered"
        Sandwich clustered by unit, or by row (cross-sections only).
    small_sample : bool, default=True
        Multiply the covariance by n_units / (n_units - 1).
    moments : {"standard", "renewal_robust"}, optional
        ``"renewal_robust"`` residualises the instruments on the persistent states
        (``Model.persistent``) so the moments of within-unit parameters need no correction for
        the post-renewal value (METHOD §4b); parameters it cannot identify keep the standard
        moment. Default: ``"renewal_robust"`` for debiased renewal models that declare
        persistent states, ``"standard"`` otherwise.
    nuisances : Nuisances, optional
        Known nuisance values (e.g. the simulator's exact ones) instead of cross-fitting.
    model_ccp_steps : int, default=0
        Model-implied CCP steps after the first solve. Each step replaces the learner's CCP
        by the model's :math:`\\Lambda(\\hat\\theta)` (built from the current continuation
        expectations, clipped to ``clip``), refits the continuation regressions of its
        :math:`\\ln P_R` target (same folds; K regressor fits per continuation choice) and
        solves again. Where the anchor choice is so rare that no learner can resolve its
        probability (states from which the anchor is essentially never chosen), the model's
        utility index extrapolates it instead of the learner's floor. Needs the standard
        moment (``moments="standard"``: terminal models, or renewal models that ask for it)
        and cross-fitted nuisances. Measured to help in the terminal (exit) design and to
        hurt in the binary renewal design, where the renewal-robust moments without steps are
        far more precise; see ``docs/validation.md``. The refits use plain cross-fitting
        whatever ``scheme`` is; the clipping counts and warning describe the model-implied
        CCPs the final moment uses, while ``diagnostics`` and ``plugin_params`` describe the
        learner's first stage. The refits' seeds come from their own stream, so the folds
        and first stage equal those of a run without steps.
    correction_weights : {"solution", "plugin"}, default="solution"
        Where the corrections' weights :math:`A_a - \\bar A(\\theta)` (and :math:`g(\\theta)`)
        are evaluated. ``"solution"`` solves :math:`\\sum_i m_i(\\theta) + \\phi_i(\\theta) = 0`.
        ``"plugin"`` fixes them at the plug-in solution :math:`\\tilde\\theta` and solves
        :math:`\\sum_i m_i(\\theta) + \\phi_i(\\tilde\\theta) = 0`; the two are first-order
        equivalent because :math:`E[\\partial\\phi/\\partial\\theta] = 0` at the truth and
        :math:`\\tilde\\theta` is consistent (the one-step argument of Newey & McFadden 1994,
        §3.4). With fixed weights the estimator cannot move :math:`\\theta` to shrink the
        weight of a rare large correction term, which it does with ``"solution"`` when the
        anchor choice is rare at some next states (measured in ``docs/validation.md``). The
        covariance uses the same fixed corrections.
    backend : {"sequential", "joblib", "dask"}, distributed.Client or str, optional
        Where the cross-fitting's learner fits run: in this process, in ``n_jobs`` joblib
        worker processes, or on a Dask cluster (a ``distributed.Client``, a scheduler address
        such as ``"tcp://10.0.0.5:8786"``, or ``"dask"`` for the session's client). Default:
        ``"joblib"`` when ``n_jobs`` > 1, else ``"sequential"``. The estimates are identical
        on every backend; see ``docs/scaling.md``.
    n_jobs : int, optional
        Worker processes for ``backend="joblib"`` (-1: one per core). Learners inside the
        workers are capped at cores // n_jobs threads.

    Returns
    -------
    Results

    Notes
    -----
    The estimate solves :math:`\\sum_{i,t} \\psi_{it}(\\hat\\theta) = 0` with
    :math:`\\psi = m + \\phi_\\mu + \\phi_P` (see :mod:`orthoccp.moments`), starting from the
    plug-in pseudo-likelihood solution, and
    :math:`\\hat V = c\\,G^{-1}\\sum_i s_i s_i' G^{-1\\prime}`, :math:`s_i = \\sum_t \\psi_{it}`.
    With S splits, :math:`\\hat\\theta = \\mathrm{median}_s\\,\\hat\\theta_s` and
    :math:`\\hat V = \\mathrm{median}_s[\\hat V_s + (\\hat\\theta_s - \\hat\\theta)(\\hat\\theta_s - \\hat\\theta)']`
    (Chernozhukov et al. 2018). Valid under logit shocks, a known discount factor, finite
    dependence, conditional independence and stationarity.

    References
    ----------
    Hotz & Miller (1993) REStud 60; Arcidiacono & Miller (2011) Econometrica 79;
    Chernozhukov et al. (2018) Econometrics Journal 21; Chernozhukov, Escanciano, Ichimura,
    Newey & Robins (2022) Econometrica 90.
    """
    t_start = time.perf_counter()
    plan = _plan(panel, model, learner=learner, regressor=regressor, folds=folds, seed=seed,
                 debias=debias, splits=splits, scheme=scheme, clip=clip, cov=cov,
                 small_sample=small_sample, moments=moments, nuisances=nuisances,
                 model_ccp_steps=model_ccp_steps, correction_weights=correction_weights,
                 backend=backend, n_jobs=n_jobs)
    fits = []
    for split in range(1 if nuisances is not None else splits):  # a loop: warnings' stacklevel
        fits.append(_fit_split(plan, split))
    return _assemble(plan, fits, t_start=t_start)


@dataclass(frozen=True, eq=False)
class _Plan:
    """The checked inputs of one call of :func:`estimate`: what every fold split uses."""

    panel: Panel
    model: Model
    bound: BoundModel
    pair: Any
    runner: Any
    rows: np.ndarray
    corrected: np.ndarray
    accounting: RowAccounting
    moments: str
    robust: RobustPlan | None
    fcols: np.ndarray | None
    static: bool
    debias: bool
    fixed: bool
    folds: int
    seed: int
    scheme: str
    clip: float
    cov: str
    small_sample: bool
    model_ccp_steps: int
    nuisances: Nuisances | None
    correction_weights: str

    @property
    def corrects(self) -> bool:
        """Whether the moment carries the corrections (debiased and dynamic)."""
        return self.debias and not self.static


@dataclass(frozen=True, eq=False)
class _SplitFit:
    """One fold split's first stage, solution and covariance."""

    theta: np.ndarray
    plugin: np.ndarray
    cov: np.ndarray
    influence: pd.DataFrame
    decomposition: pd.DataFrame
    route: str
    note: str
    one_step: np.ndarray | None
    unseen: np.ndarray | None
    pieces: MomentPieces
    n_fits: int
    iterations: int
    clipped: dict[Any, int]
    n_clipped_moment_rows: int
    first_stage_s: float
    second_stage_s: float
    identification: np.ndarray | None = None
    diagnostics: Diagnostics | None = None


def _plan(panel: Any, model: Any, *, learner: Any, regressor: Any, folds: Any, seed: Any,
          debias: Any, splits: Any, scheme: Any, clip: Any, cov: Any, small_sample: Any,
          moments: Any, nuisances: Nuisances | None, model_ccp_steps: Any,
          correction_weights: Any, backend: Any, n_jobs: Any) -> _Plan:
    """Check every input of :func:`estimate` and bind the model (the warnings about the
    model's assumptions are issued here, once)."""
    if not isinstance(panel, Panel):
        raise InputError(
            f"panel must be an orthoccp.Panel, got {type(panel).__name__}; wrap the DataFrame "
            f"with Panel(df, unit=..., period=..., choice=..., states=[...])."
        )
    if not isinstance(model, Model):
        raise InputError(f"model must be an orthoccp.Model, got {type(model).__name__}.")
    check_options(splits=splits, folds=folds, clip=clip, seed=seed, debias=debias,
                  small_sample=small_sample)
    check_cov_name(cov)
    runner = resolve_backend(backend, n_jobs)
    _check_scheme(scheme, folds)
    if cov == "clustered" and panel.n_units < 2 and model.discount == 0:
        raise InputError(
            f"the data have {panel.n_units} unit; clustered standard errors need at least two "
            f"clusters (units)."
        )
    bound = model.bind(panel)
    moments = _choose_moments(bound, moments, debias)
    _check_model_ccp_steps(model_ccp_steps, moments=moments, nuisances=nuisances, bound=bound)
    check_option("correction_weights", correction_weights)
    rows, corrected, accounting = account_rows(bound)
    if rows.size < panel.n_rows:
        bound._check_identified(rows)
    pair = resolve_learners(learner, regressor)
    robust = moments == "renewal_robust"
    if robust:
        warn_if_not_persistent(bound, stacklevel=4)
    warn_if_not_reset(bound, stacklevel=4)
    return _Plan(
        panel=panel, model=model, bound=bound, pair=pair, runner=runner, rows=rows,
        corrected=corrected, accounting=accounting, moments=moments,
        robust=plan_robust(bound) if robust else None,
        fcols=persistent_feature_columns(bound) if robust else None,
        static=not bound.has_next_stage, debias=bool(debias),
        fixed=correction_weights == "plugin", folds=int(folds), seed=int(seed),
        scheme=scheme, clip=float(clip), cov=cov, small_sample=bool(small_sample),
        model_ccp_steps=int(model_ccp_steps), nuisances=nuisances,
        correction_weights=str(correction_weights),
    )


def _first_stage(plan: _Plan, split: int) -> Nuisances:
    """The split's nuisances: supplied, none needed (static), or cross-fitted."""
    if plan.nuisances is not None:
        return plan.nuisances
    if plan.static:
        J = len(plan.panel.choices)
        return Nuisances(ccp=np.full((plan.panel.n_rows, J), 1.0 / J),
                         mu=np.full((plan.panel.n_rows, J, plan.bound.n_targets), np.nan))
    return _cross_fitted(plan.bound, plan.pair, plan.folds, plan.seed, split=split,
                         scheme=plan.scheme, clip=plan.clip, anchor_features=plan.fcols,
                         backend=plan.runner)


def _fix_weights(plan: _Plan, system: Any, at: np.ndarray) -> Any:
    """With ``correction_weights="plugin"``, the system with its corrections' weights fixed at
    ``at``; otherwise the system itself."""
    if plan.fixed:
        return replace(system, correction_theta=np.array(at, dtype=np.float64))
    return system


def _fit_split(plan: _Plan, split: int) -> _SplitFit:
    """One fold split: first stage, plug-in solve, instruments, orthogonal solve, model-implied
    steps, covariance, and (split 1) the diagnostics and identification strength."""
    bound, panel, params = plan.bound, plan.panel, plan.bound.parameters
    t0 = time.perf_counter()
    nuis = _first_stage(plan, split)
    first_stage_s = time.perf_counter() - t0
    n_fits = nuis.n_fits
    learner_nuis = nuis  # the learner's out-of-fold nuisances, for the diagnostics

    if split == 0 and plan.corrects and plan.moments == "standard":
        # Before the solve, which is the step a tiny P_R can break. Only the probability
        # rule warns here; the expected-count rule, which small panels trip easily, is
        # left to the diagnostics' reading.
        check = check_anchor_probability(
            panel, nuis.ccp, anchor=panel.choices[bound.anchor_index], kind=plan.model.kind,  # type: ignore[arg-type]
            min_expected=0.0,
        )
        if check.warning:
            warnings.warn(check.warning, OrthoCCPWarning, stacklevel=3)

    t1 = time.perf_counter()
    system = build_moment_system(bound, nuis, plan.rows, plan.corrected)
    theta0, info = solve_plugin(system)
    theta = theta0
    if plan.robust is not None:
        assert plan.fcols is not None
        row_folds = nuis.folds if nuis.folds is not None else unit_folds(
            panel.unit_codes, plan.folds, stream(plan.seed, "folds", split=split),
            unit_keys=panel.unit_keys,
        )
        system = renewal_robust_system(
            system, theta0, FeatureRows(panel.features, plan.rows, plan.fcols),
            row_folds[plan.rows], plan.robust, plan.pair,
            stream(plan.seed, "projections", split=split), backend=plan.runner,
        )
        n_fits += plan.folds * int(plan.robust.robust.sum())
    if plan.corrects:
        system = _fix_weights(plan, system, theta0)
        try:
            theta, info = solve_orthogonal(system, theta0)
        except EstimationError as exc:
            if plan.robust is not None:
                _raise_if_reset(bound, exc)
            _name_the_unidentified(exc, system, theta0, params)
            raise
    iterations = info.iterations
    step_rng = stream(plan.seed, "ccp_steps", split=split)
    for _ in range(plan.model_ccp_steps):
        t2 = time.perf_counter()
        implied, hit = model_ccp_clipped(bound, nuis, theta, plan.clip)
        nuis = refit_anchor_target(bound, plan.pair, nuis, implied, step_rng,
                                   backend=plan.runner, clipped=hit)
        n_fits += nuis.n_fits
        first_stage_s += time.perf_counter() - t2
        system = build_moment_system(bound, nuis, plan.rows, plan.corrected)
        theta, info = solve_plugin(system)  # plugin_params keep the learner's plug-in
        if plan.debias:
            system = _fix_weights(plan, system, theta)
            theta, info = solve_orthogonal(system, theta)
        iterations += info.iterations
    if info.route != "newton" and plan.debias:
        warnings.warn(f"split {split + 1}: {info.note}.", OrthoCCPWarning, stacklevel=3)
    n_clipped = 0
    if nuis.clipped_rows is not None:
        # A moment row depends on the CCP at its next row.
        nxt = panel.next_row[plan.rows]
        n_clipped = int(nuis.clipped_rows[np.where(nxt >= 0, nxt, plan.rows)].sum())
    ce = estimate_covariance(
        plan.cov, jacobian=system.jacobian(theta),
        components=system.components(theta, debias=plan.corrects), units=system.units,
        parameters=params, small_sample=plan.small_sample,
    )
    second_stage_s = time.perf_counter() - t1
    identification = diagnostics = None
    if split == 0 and plan.corrects:
        Z = bound.Z[plan.rows]
        identification = identification_strength(
            system.X, Z - Z[:, bound.anchor_index : bound.anchor_index + 1, :],
            system.probabilities(theta),
        )
    if split == 0 and not plan.static:
        clustered = plan.cov == "clustered"
        diagnostics = compute_diagnostics(
            bound, learner_nuis, plan.rows, clip=plan.clip,
            influence=ce.influence if clustered else None,
            influence_units=panel.unit_labels[ce.clusters] if clustered else None,
        )
    return _SplitFit(
        theta=theta, plugin=theta0, cov=ce.cov,
        influence=pd.DataFrame(ce.influence, index=ce.clusters),
        decomposition=ce.decomposition,
        route=info.route if plan.corrects else "plug-in", note=info.note,
        one_step=info.one_step,
        unseen=unseen_variance(system, theta) if plan.corrects else None,
        pieces=MomentPieces(
            system=system, index=panel.source_index[plan.rows],
            units=panel.unit_labels[system.units], choices=panel.choices, parameters=params,
            theta=np.array(theta, dtype=np.float64), debiased=plan.corrects),
        n_fits=n_fits, iterations=iterations, clipped=dict(nuis.clipped),
        n_clipped_moment_rows=n_clipped, first_stage_s=first_stage_s,
        second_stage_s=second_stage_s, identification=identification, diagnostics=diagnostics,
    )


def _assemble(plan: _Plan, fits: list[_SplitFit], *, t_start: float) -> Results:
    """Combine the splits (median estimate; covariance with the splits' spread), warn about
    clipping and flagged intervals, and build the results record."""
    params = plan.bound.parameters
    index = pd.Index(params, name="parameter")
    thetas = np.vstack([f.theta for f in fits])
    theta_hat = np.median(thetas, axis=0)
    if len(fits) == 1:
        V = fits[0].cov
    else:
        V = np.median(
            np.stack([f.cov + np.outer(f.theta - theta_hat, f.theta - theta_hat) for f in fits]),
            axis=0,
        )
    se = np.sqrt(np.diag(V))
    if not np.all(np.isfinite(theta_hat)) or not np.all(np.isfinite(se)):
        raise InputError("estimation produced non-finite estimates or standard errors.")
    infl = sum(f.influence for f in fits) / len(fits)
    decomposition = sum(f.decomposition for f in fits) / len(fits)

    n_clipped_rows = sum(f.n_clipped_moment_rows for f in fits) // len(fits)
    n_moment_rows = plan.accounting.n_moment_rows
    if n_clipped_rows > 0.01 * n_moment_rows and not plan.static:
        warnings.warn(
            f"{n_clipped_rows} of {n_moment_rows} moment rows (more than 1%) use a "
            f"probability clipped at [{plan.clip:g}, {1 - plan.clip:g}]; estimates may be "
            f"sensitive to the clip bound. Inspect overlap or use a smoother learner.",
            OrthoCCPWarning, stacklevel=3,
        )
    routes = [f.route for f in fits]
    checks = None
    if plan.corrects and all(f.one_step is not None for f in fits):
        checks = interval_check(
            params, estimates=thetas, plugins=np.vstack([f.plugin for f in fits]),
            one_steps=np.vstack([f.one_step for f in fits]), std_errors=se,
            influence=infl.to_numpy(), identification=fits[0].identification, routes=routes,
            cov=V, unseen=np.vstack([f.unseen for f in fits]),
        )
        which = (f"first stage {plan.pair.name}" if plan.nuisances is None
                 else "nuisances supplied by the caller")
        for reading in checks.readings() if checks.flagged else ():
            warnings.warn(f"{reading} [{which}, seed {plan.seed}]", OrthoCCPWarning,
                          stacklevel=3)

    timings = {"first_stage_s": sum(f.first_stage_s for f in fits),
               "second_stage_s": sum(f.second_stage_s for f in fits),
               "learner_fit_s": plan.runner.tally.fit_s,
               "learner_predict_s": plan.runner.tally.predict_s,
               "total_s": time.perf_counter() - t_start}
    std_errors = pd.Series(se, index=index, name="std_error")
    split_params = pd.DataFrame(thetas, columns=index) if len(fits) > 1 else None
    fitted_here = plan.nuisances is None and not plan.static
    clipped: dict[str, int] = {}
    for f in fits:  # the CCPs the final moment uses (the model's after the steps)
        for k, v in f.clipped.items():
            clipped[str(k)] = clipped.get(str(k), 0) + int(v)
    details = CrossFitDetails(
        learner=plan.pair.name if fitted_here else "-",
        regressor=plan.pair.regressor_name if fitted_here else "-",
        folds=plan.folds, splits=len(fits), scheme=plan.scheme, clip=plan.clip,
        clipped=clipped, n_learner_fits=sum(f.n_fits for f in fits),
        iterations=sum(f.iterations for f in fits), split_params=split_params,
        split_spread=CrossFitDetails.spread(split_params, std_errors),
        plugin_params=pd.Series(np.median(np.vstack([f.plugin for f in fits]), axis=0),
                                index=index, name="plug-in"),
        nuisance_source=_nuisance_source(plan),
        model_ccp_steps=plan.model_ccp_steps if fitted_here else 0,
        correction_weights=plan.correction_weights, moments=plan.moments,
        diagnostics=fits[0].diagnostics,
        fallback=dict(plan.robust.reasons) if plan.robust is not None else {},
        solve_routes=tuple(routes), solve_notes=tuple(f.note for f in fits),
        interval_check=checks, pieces=tuple(f.pieces for f in fits),
    )
    clustered = plan.cov == "clustered"
    return Results(
        params=pd.Series(theta_hat, index=index, name="estimate"),
        std_errors=std_errors,
        cov=pd.DataFrame(V, index=index, columns=index),
        debiased=plan.debias,
        model=plan.model.to_dict(),
        seed=plan.seed,
        cov_type=plan.cov,
        small_sample=plan.small_sample,
        n_units=plan.panel.n_units,
        accounting=plan.accounting,
        decomposition=decomposition,
        influence=infl.to_numpy(),
        influence_units=(plan.panel.unit_labels[infl.index.to_numpy()] if clustered
                         else infl.index.to_numpy()),
        details=details,
        timings=timings,
        version=__version__,
    )


def _nuisance_source(plan: _Plan) -> str:
    """Where the nuisances came from, as the summary's first-stage line says it."""
    if plan.static:
        return "none needed (discount 0: static logit)"
    if plan.nuisances is not None:
        return "supplied by the caller"
    source = "cross-fitted"
    steps = plan.model_ccp_steps
    if steps:
        source += (f", then {steps} model-implied CCP step{'s' if steps > 1 else ''} (ln P_R "
                   f"regressions refitted with plain cross-fitting)")
    return source


# A store of cross-fitted first stages, keyed by everything they depend on, set by
# :func:`orthoccp.sensitivity.discount_sensitivity` to reuse them across discount factors.
_FIRST_STAGE_STORE: ContextVar[dict[Any, Any] | None] = ContextVar("first_stage_store",
                                                                   default=None)


def _cross_fitted(
    bound: BoundModel, pair: Any, folds: int, seed: int, *, split: int,
    scheme: str, clip: float, anchor_features: np.ndarray | None, backend: Any,
) -> Nuisances:
    """The split's folds and cross-fitted nuisances (CCPs, continuation regressions).

    The folds come from the ``folds`` stream and the learners' seeds from the ``first_stage``
    stream of ``seed`` (:mod:`orthoccp._random`), so they depend on ``seed`` and ``split``
    only. Neither depends on the discount factor: when a store is active
    (``_FIRST_STAGE_STORE``), a first stage computed before from the same inputs is reused.
    """
    store = _FIRST_STAGE_STORE.get()
    key = None
    if store is not None:
        key = (id(bound.panel), pair.name, split, int(seed), folds, scheme, clip,
               None if anchor_features is None else tuple(np.asarray(anchor_features).tolist()),
               bound.has_next_stage)
        if key in store:
            return replace(store[key], n_fits=0, timings={"ccp_s": 0.0, "continuation_s": 0.0})
    fold_of_row = unit_folds(bound.panel.unit_codes, folds, stream(seed, "folds", split=split),
                             unit_keys=bound.panel.unit_keys)
    nuis = crossfit_nuisances(
        bound, pair, fold_of_row, stream(seed, "first_stage", split=split), scheme=scheme,
        clip=clip, anchor_features=anchor_features, backend=backend,  # type: ignore[arg-type]
    )
    if store is not None:
        store[key] = nuis
    return nuis


def _check_model_ccp_steps(steps: Any, *, moments: str, nuisances: Nuisances | None,
                           bound: BoundModel) -> None:
    if isinstance(steps, bool) or not isinstance(steps, (int, np.integer)) or steps < 0:
        raise InputError(f"model_ccp_steps must be an integer >= 0, got {steps!r}.")
    if steps == 0:
        return
    if nuisances is not None:
        raise InputError(
            "model_ccp_steps needs cross-fitted nuisances (it refits the continuation "
            "regressions); drop nuisances= or set model_ccp_steps=0."
        )
    if not bound.has_next_stage:
        raise InputError("model_ccp_steps needs a dynamic model (discount > 0).")
    if moments != "standard":
        raise InputError(
            f"model_ccp_steps needs the standard moment, got moments={moments!r}; pass "
            f"moments='standard' or set model_ccp_steps=0."
        )


def model_ccp(bound: BoundModel, nuisances: Nuisances, theta: np.ndarray, clip: float) -> np.ndarray:
    r"""(n_rows, J) model-implied CCPs :math:`\Lambda_j(w(x; \theta, \hat\mu))` at every row.

    :math:`w_j = X_j'\theta + o_j` from the continuation expectations at the row (METHOD §2),
    so the anchor probability follows the utility index where no learner can resolve it.
    Clipped to [clip, 1 - clip] like the learner's (:func:`model_ccp_clipped` also returns
    which entries were clipped).
    """
    return model_ccp_clipped(bound, nuisances, theta, clip)[0]


def model_ccp_clipped(
    bound: BoundModel, nuisances: Nuisances, theta: np.ndarray, clip: float
) -> tuple[np.ndarray, np.ndarray]:
    """:func:`model_ccp` and the (n_rows, J) boolean matrix of the entries it clipped."""
    n = bound.panel.n_rows
    system = build_moment_system(bound, nuisances, np.arange(n), np.zeros(n, dtype=bool))
    return clip_probabilities(system.probabilities(theta), float(clip))


def _choose_moments(bound: BoundModel, moments: str | None, debias: bool) -> str:
    model = bound.model
    eligible = model.kind == "renewal" and bool(model.persistent) and model.discount > 0
    if moments is None:
        return "renewal_robust" if (eligible and debias) else "standard"
    if moments not in ("standard", "renewal_robust"):
        raise InputError(
            f"moments must be 'standard' or 'renewal_robust', got {moments!r}."
        )
    if moments == "renewal_robust":
        if model.kind != "renewal":
            raise InputError("moments='renewal_robust' needs a renewal model (kind='renewal').")
        if not model.persistent:
            raise InputError(
                "moments='renewal_robust' needs the persistent states: declare "
                "Model(persistent=[...]) with the states a renewal does not reset."
            )
        if model.discount == 0:
            raise InputError("moments='renewal_robust' needs discount > 0.")
        if not debias:
            raise InputError("moments='renewal_robust' is a debiased moment; use debias=True.")
    return moments


def _name_the_unidentified(exc: EstimationError, system: Any, theta: np.ndarray,
                           params: tuple[str, ...]) -> None:
    """A singular Jacobian: raise again naming the parameters its null direction moves.

    The right singular vector of :math:`G` for its smallest singular value is the direction in
    which the parameters move without changing the moment; its large entries name them.
    """
    if "singular or ill-conditioned" not in str(exc):
        return
    G = system.jacobian(theta)
    if not np.all(np.isfinite(G)):
        return
    _, sv, vt = np.linalg.svd(G)
    v = vt[-1]
    named = [f"{params[k]} ({v[k]:+.2f})" for k in np.argsort(-np.abs(v)) if abs(v[k]) >= 0.3]
    raise EstimationError(
        f"{exc} The moment does not move along the direction {', '.join(named)} (smallest "
        f"singular value of G {sv[-1]:.3g} against the largest {sv[0]:.3g}): check that those "
        f"parameters' utility columns vary across rows and choices, and that no two of them are "
        f"proportional."
    ) from exc


def _changed_after_renewal(bound: BoundModel) -> tuple[dict[str, int], int]:
    """Per declared persistent state, the renewal rows after which it changes; and the number
    of renewal rows with a next row."""
    panel = bound.panel
    after = (panel.choice_codes == bound.anchor_index) & (panel.next_row >= 0)
    i, j = np.flatnonzero(after), panel.next_row[after]
    out: dict[str, int] = {}
    for col in bound.model.persistent:
        values = panel.frame[col].to_numpy()
        out[col] = int((values[i] != values[j]).sum())
    return out, int(i.size)


def _raise_if_reset(bound: BoundModel, exc: EstimationError) -> None:
    """A failed renewal-robust solve with a declared persistent state that the renewal
    resets: name the state (the real cause) instead of the singular Jacobian."""
    changed, n = _changed_after_renewal(bound)
    reset = {col: c for col, c in changed.items() if n and c >= n / 2}
    if reset:
        col, c = next(iter(reset.items()))
        raise InputError(
            f"persistent state {col!r} is reset by the renewal (it changes right after "
            f"{c} of {n} renewals), so it cannot be persistent: residualised on it, the "
            f"renewal-robust moments leave the parameters unidentified (the solve met a "
            f"singular Jacobian). Remove {col!r} from persistent (declare only the states a "
            f"renewal carries through) or use moments='standard'."
        ) from exc
