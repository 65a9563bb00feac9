"""The pipeline for user moments: bind -> folds -> cross-fit -> Riesz weights -> GMM -> sandwich."""

from __future__ import annotations

import time
import warnings
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, ClassVar

import numpy as np
import pandas as pd

from .._errors import EstimationError, InputError, OrthoCCPWarning
from .._numeric import central_jacobian
from .._random import stream
from .._options import check_options
from .._version import __version__
from ..covariance import check_cov_name, cluster_codes, estimate_covariance
from ..data import Panel
from ..folds import unit_folds
from ..learners import LearnerPair, resolve_learners
from ..results import Details, NotApplicable, Results, RowAccounting, covariance_line, json_number
from ._crossfit import FittedNuisance, crossfit
from ._functions import MomentFunction
from ._gmm import GMMFit, HansenJ, anderson_step, cluster_sums, two_step_gmm
from ._riesz import RieszFit, check_method, correction_terms, fit_corrections
from ._spec import Nuisance, Rows, bind_nuisance

__all__ = ["estimate_moments", "MomentDetails", "MomentFit", "MomentResults"]

USER_ASSUMPTIONS = (
    "the moment has mean zero at the true parameters and the true nuisances",
    "each nuisance is the conditional expectation of its target given its features",
    "units are independent (standard errors are clustered by unit)",
)


@dataclass(frozen=True, eq=False)
class MomentFit:
    """Everything the estimate used: data view, nuisances, weights, moment (for checks)."""

    rows: Rows
    moment: MomentFunction
    fitted: list[FittedNuisance]
    riesz: list[RieszFit]
    folds: np.ndarray
    units: np.ndarray
    n_units: int
    theta: np.ndarray
    parameters: tuple[str, ...]

    def values(self) -> dict[str, np.ndarray]:
        """Cross-fitted nuisance values by label."""
        nu: dict[str, np.ndarray] = {}
        for f in self.fitted:
            nu.update(f.values)
        return nu

    def corrections(self, nu: Mapping[str, np.ndarray] | None = None) -> dict[str, np.ndarray]:
        """Per-row correction of each nuisance (at ``nu``, default the fitted values)."""
        return correction_terms(self.fitted, self.riesz, self.rows, self.values() if nu is None else nu)


@dataclass(frozen=True, eq=False)
class MomentDetails(Details):
    """Details of :func:`estimate_moments` (:attr:`MomentResults.details`).

    Attributes
    ----------
    learner : str
        Each nuisance's learner (``"name: learner; ..."``).
    folds : int
        Folds by unit of the cross-fitting.
    clip : float
        Binary nuisances are clipped to ``[clip, 1 - clip]``; ``clipped`` counts rows per
        nuisance.
    n_learner_fits, iterations : int
        Learner fits (nuisances and learner-based Riesz fits) and second-stage iterations.
    n_moments : int
        Moments in the system.
    nuisances : tuple of str
        The nuisances' names.
    correction : str
        How the correction was built (Riesz regression, dictionary, next-row values, updates).
    plugin_params : pandas.Series or None
        The plug-in estimates (moments without corrections).
    hansen : HansenJ or NotApplicable
        The over-identification test (``NotApplicable`` for just-identified moments).
    fit : MomentFit or None
        Nuisance values and correction weights (used by :func:`check_orthogonality`); None
        when reloaded from JSON.
    """

    kind: ClassVar[str] = "user-moments"
    assumptions: ClassVar[tuple[str, ...]] = USER_ASSUMPTIONS

    learner: str
    folds: int
    clip: float
    clipped: dict[str, int]
    n_learner_fits: int
    iterations: int
    n_moments: int
    nuisances: tuple[str, ...]
    correction: str
    plugin_params: pd.Series | None = None
    hansen: HansenJ | NotApplicable = NotApplicable("not computed")
    fit: MomentFit | None = field(default=None, repr=False)

    @property
    def hansen_j(self) -> HansenJ | NotApplicable:
        return self.hansen

    def method(self, debiased: bool) -> str:
        if debiased:
            return "GMM with user moments, automatically debiased (Riesz regression)"
        return "GMM with user moments, plug-in (NOT debiased; standard errors ignore first-stage noise)"

    def title(self, res: Results) -> str:
        return (f"moments: {self.n_moments} for {len(res.params)} parameters; "
                f"nuisances: {', '.join(self.nuisances)}")

    def lines(self, res: Results, *, plugin: bool) -> list[str]:
        lines = ["reloaded from JSON: the nuisance fit is not kept"] if res.reloaded else []
        lines.append(f"units {res.n_units}; {res.accounting.describe()}")
        lines.append(f"first stage: {self.learner}; {self.folds} folds by unit, seed {res.seed}; "
                     f"{self.n_learner_fits} learner fits")
        if res.debiased:
            lines.append(f"correction: {self.correction}")
        lines.append(covariance_line(res.cov_type, res.small_sample))
        h = self.hansen
        lines.append(f"Hansen J: {h}" if isinstance(h, HansenJ)
                     else f"Hansen J: not applicable ({h.reason}).")
        return lines

    def to_dict(self) -> dict[str, Any]:
        h = self.hansen
        return {
            "kind": self.kind, "learner": self.learner, "folds": self.folds, "clip": self.clip,
            "clipped": {str(k): int(v) for k, v in self.clipped.items()},
            "n_learner_fits": self.n_learner_fits, "iterations": self.iterations,
            "n_moments": self.n_moments, "nuisances": list(self.nuisances),
            "correction": self.correction,
            "plugin_params": (None if self.plugin_params is None else
                              {str(k): json_number(v) for k, v in self.plugin_params.items()}),
            "hansen": ({"statistic": json_number(h.statistic), "df": int(h.df),
                        "p_value": json_number(h.pvalue)} if isinstance(h, HansenJ)
                       else {"reason": h.reason}),
        }

    @classmethod
    def from_dict(cls, doc: Mapping[str, Any], *, index: pd.Index,
                  std_errors: pd.Series) -> MomentDetails:
        h, plugin = doc.get("hansen") or {}, doc.get("plugin_params")
        return cls(
            learner=str(doc["learner"]), folds=int(doc["folds"]), clip=float(doc["clip"]),
            clipped={str(k): int(v) for k, v in doc.get("clipped", {}).items()},
            n_learner_fits=int(doc["n_learner_fits"]), iterations=int(doc["iterations"]),
            n_moments=int(doc["n_moments"]), nuisances=tuple(doc["nuisances"]),
            correction=str(doc["correction"]),
            plugin_params=(None if plugin is None else pd.Series(
                [float("nan") if plugin[n] is None else float(plugin[n]) for n in index],
                index=index, name="plug-in")),
            hansen=(HansenJ(float(h["statistic"]), int(h["df"]), float(h["p_value"]))
                    if "statistic" in h else NotApplicable(str(h.get("reason", "")))),
        )



@dataclass(frozen=True, eq=False)
class MomentResults(Results):
    """:class:`~orthoccp.Results` of :func:`estimate_moments`: the shared record with
    :class:`MomentDetails` (Hansen's J when it applies, the nuisance fit); ``res.hansen``,
    ``res.fit`` and the other details read through to ``res.details``."""

    details: MomentDetails = field(repr=False)


def _check_options(folds: Any, seed: Any, clip: Any, parameters: Any, start: Any) -> np.ndarray:
    check_options(folds=folds, seed=seed, clip=clip)
    if isinstance(parameters, str) or not isinstance(parameters, Sequence) or not parameters or not all(
        isinstance(p, str) and p for p in parameters
    ) or len(set(parameters)) != len(parameters):
        raise InputError(
            f"parameters must be a non-empty list of distinct names, got {parameters!r}."
        )
    theta0 = np.zeros(len(parameters)) if start is None else np.asarray(start, dtype=np.float64).reshape(-1)
    if theta0.size != len(parameters) or not np.all(np.isfinite(theta0)):
        raise InputError(
            f"start must hold {len(parameters)} finite numbers (one per parameter), got {start!r}."
        )
    return theta0


def _riesz_pair(riesz_learner: Any) -> LearnerPair:
    """``riesz_learner``: a registry name or a (classifier, regressor) pair."""
    if isinstance(riesz_learner, str):
        return resolve_learners(riesz_learner)
    if isinstance(riesz_learner, tuple) and len(riesz_learner) == 2:
        return resolve_learners(riesz_learner[0], riesz_learner[1])
    raise InputError(
        f"riesz_learner must be a registry name or a (classifier, regressor) pair, got "
        f"{type(riesz_learner).__name__}."
    )


def _check_nuisances(nuisances: Any) -> list[Nuisance]:
    if isinstance(nuisances, Nuisance):
        nuisances = [nuisances]
    if not isinstance(nuisances, Sequence) or not nuisances or not all(
        isinstance(n, Nuisance) for n in nuisances
    ):
        raise InputError(
            f"nuisances must be a non-empty list of orthoccp Nuisance objects, got {nuisances!r}."
        )
    seen: set[str] = set()
    for n in nuisances:
        for label in n.labels:
            if label in seen:
                raise InputError(
                    f"nuisance value name {label!r} is used twice; every nuisance name and "
                    f"evaluation label must be unique."
                )
            seen.add(label)
    return list(nuisances)


def estimate_moments(
    panel: Panel,
    moment: Callable[[np.ndarray, Rows, Mapping[str, np.ndarray]], Any],
    nuisances: Sequence[Nuisance],
    *,
    parameters: Sequence[str],
    start: Sequence[float] | None = None,
    folds: int = 5,
    seed: int = 0,
    debias: bool = True,
    riesz: str = "lasso",
    penalty: float = 1.0,
    next_weights: str = "projected",
    riesz_learner: Any = "lightgbm",
    riesz_updates: int = 25,
    riesz_tol: float = 1e-6,
    clip: float = 1e-4,
    cov: str = "clustered",
    small_sample: bool = True,
) -> MomentResults:
    """Estimate parameters from a user-written moment with automatically debiased ML nuisances.

    Parameters
    ----------
    panel : Panel
        The data; ``moment`` and the targets see its rows as :class:`Rows`.
    moment : callable
        ``moment(theta, rows, nu) -> (n_rows, k)`` array with k >= number of parameters;
        ``nu`` maps every nuisance name and evaluation label to one value per row. Rows where
        any component is NaN are not moment rows. Row t may use the values of row t only.
    nuisances : sequence of Nuisance
        In dependency order (a generated target may use earlier nuisances' values).
    parameters : sequence of str
        Names of the entries of ``theta``.
    start : sequence of float, optional
        Starting values (default zeros).
    folds : int, default=5
        Cross-fitting folds, by unit (:func:`orthoccp.folds.unit_folds`).
    seed : int, default=0
        Drives the folds and every learner's ``random_state``.
    debias : bool, default=True
        ``False`` gives the plug-in GMM estimate (no corrections).
    riesz : {"lasso", "learner"}, default="lasso"
        Penalised Riesz regression on each nuisance's dictionary, or a learner-based fit.
    penalty : float, default=1.0
        c in :math:`r = c\\,\\hat\\sigma_\\alpha\\sqrt{\\ln p / n}`; 0 gives the unpenalised
        projection.
    next_weights : {"projected", "observed"}, default="projected"
        How values at the unit's next row are corrected (see :mod:`orthoccp.custom._riesz`):
        ``"observed"`` uses the observed derivative on the moment row, valid under the
        conditional independence of dynamic discrete choice models.
    riesz_learner : str or (classifier, regressor), default="lightgbm"
        Learners for ``riesz="learner"``: the regressor fits the derivatives, the classifier
        the density ratio between evaluation points and training rows.
    riesz_updates : int, default=25
        Most times the weights are recomputed at the latest estimate (the first at the
        plug-in). The updates stop at the fixed point
        :math:`\\sum_t \\psi_t(\\hat\\theta; \\hat\\alpha(\\hat\\theta)) = 0`,
        where the weights belong to the final estimate, as in the analytic correction of
        METHOD §4 (whose :math:`\\alpha` is a function of :math:`\\theta`); the iteration is
        Anderson-accelerated (:func:`orthoccp.custom._gmm.anderson_step`). If the estimate
        still moves after ``riesz_updates`` updates, an :class:`~orthoccp.OrthoCCPWarning`
        says by how much.
    riesz_tol : float, default=1e-6
        The fixed point is reached when no parameter moves by more than
        ``riesz_tol * (1 + |theta|)`` between updates.
    clip : float, default=1e-4
        Probabilities of binary nuisances are clipped to [clip, 1 - clip].
    cov : {"clustered", "heteroskedastic"}, default="clustered"
        Sandwich clustered by unit, or by row.
    small_sample : bool, default=True
        Multiply the covariance by n_units / (n_units - 1).

    Returns
    -------
    MomentResults
        A :class:`~orthoccp.Results` with ``hansen_j`` and the ``fit`` for
        :func:`check_orthogonality`.

    Notes
    -----
    The corrected moment is :math:`\\psi = m + \\sum_\\gamma \\alpha_\\gamma(Z)(Y - \\gamma(Z))`
    with Riesz weights found automatically (Chernozhukov, Newey & Singh 2022). The estimate
    is two-step GMM on :math:`\\sum\\psi` (see :mod:`orthoccp.custom._gmm`) with
    :math:`\\hat V = c\\,(AG)^{-1}A\\hat\\Omega A'(AG)^{-1\\prime}`, :math:`A = G'W`,
    :math:`G = \\sum_t \\partial m_t/\\partial\\theta'`, :math:`\\hat\\Omega = \\sum_i s_i s_i'`.

    References
    ----------
    Chernozhukov, Newey & Singh (2022) Econometrica 90; Chernozhukov, Escanciano, Ichimura,
    Newey & Robins (2022) Econometrica 90; Hansen (1982) Econometrica 50.
    """
    t_start = time.perf_counter()
    if not isinstance(panel, Panel):
        raise InputError(
            f"panel must be an orthoccp.Panel, got {type(panel).__name__}; wrap the DataFrame "
            f"with Panel(df, unit=..., period=..., choice=..., states=[...])."
        )
    specs = _check_nuisances(nuisances)
    theta0 = _check_options(folds, seed, clip, parameters, start)
    _check_second_stage(riesz=riesz, penalty=penalty, next_weights=next_weights, cov=cov,
                        debias=debias, small_sample=small_sample, riesz_updates=riesz_updates,
                        riesz_tol=riesz_tol)
    rows = Rows(panel)
    mfun = MomentFunction(moment, rows)
    designs = [bind_nuisance(s, panel, rows) for s in specs]
    fold_of_row = unit_folds(panel.unit_codes, int(folds), stream(seed, "folds"),
                             unit_keys=panel.unit_keys)
    t0 = time.perf_counter()
    fitted = crossfit(designs, rows, fold_of_row, panel.canonical_order,
                      stream(seed, "first_stage"), clip=float(clip))
    timings = {"first_stage_s": time.perf_counter() - t0}
    n_fits = sum(f.n_fits for f in fitted)
    nu: dict[str, np.ndarray] = {}
    for f in fitted:
        nu.update(f.values)

    first = mfun.raw(theta0, nu)
    use = np.all(np.isfinite(first), axis=1)
    k, p = first.shape[1], theta0.size
    if k < p:
        raise InputError(
            f"the moment has {k} component(s) for {p} parameters; GMM needs at least as many "
            f"moments as parameters."
        )
    if not use.any():
        raise InputError("the moment is NaN on every row at the start; no row can be a moment row.")
    mfun.use = use
    units = cluster_codes(cov, panel.unit_codes)
    n_g = int(units.max()) + 1
    if n_g < 2:
        raise InputError("the covariance needs at least two clusters (units).")

    def system(extra: np.ndarray) -> tuple[Callable[[np.ndarray], np.ndarray], Callable[[np.ndarray], np.ndarray]]:
        def sums(th: np.ndarray) -> np.ndarray:
            return cluster_sums(mfun(th, nu) + extra, units, n_g)

        def gbar(th: np.ndarray) -> np.ndarray:
            return (mfun(th, nu) + extra).sum(axis=0) / n_g

        return gbar, sums

    t1 = time.perf_counter()
    zero = np.zeros((rows.n_rows, k))
    plug: GMMFit = two_step_gmm(*system(zero), theta0, what="plug-in GMM")
    result = plug
    riesz_fits: list[RieszFit] = []
    phis: dict[str, np.ndarray] = {}
    iterations = plug.iterations
    riesz_rounds = 0
    if debias:
        pair = _riesz_pair(riesz_learner) if riesz == "learner" else None

        riesz_learner_fits = [0]

        def solve_at(x: np.ndarray) -> tuple[GMMFit, list[RieszFit], dict[str, np.ndarray]]:
            """T(x): the debiased solve with the Riesz weights fitted at x (the same seeds at
            every update, a fresh ``riesz`` stream each time, so T depends on x alone)."""
            fits, extra = fit_corrections(
                mfun, x, fitted, rows, fold_of_row, method=riesz,  # type: ignore[arg-type]
                penalty=float(penalty), next_weights=next_weights,  # type: ignore[arg-type]
                riesz_pair=pair, rng=stream(seed, "riesz"), clip=float(clip),
            )
            riesz_learner_fits[0] += extra  # counted even when the solve below fails
            terms = correction_terms(fitted, fits, rows, nu)
            solved = two_step_gmm(*system(sum(terms.values(), zero)), x, what="debiased GMM")
            return solved, fits, terms

        fixed = _riesz_fixed_point(solve_at, plug.theta, updates=int(riesz_updates),
                                   tol=float(riesz_tol), memory=p + 1)
        result, riesz_fits, phis = fixed.result, fixed.riesz_fits, fixed.phis
        n_fits += riesz_learner_fits[0]
        iterations += fixed.iterations
        riesz_rounds = fixed.rounds
    theta = result.theta
    timings["second_stage_s"] = time.perf_counter() - t1

    Gsum = central_jacobian(lambda th: mfun(th, nu).sum(axis=0), theta)
    A = np.eye(p) if result.weight is None else Gsum.T @ result.weight
    components = {"m": mfun(theta, nu) @ A.T}
    components.update({f"phi_{name}": v @ A.T for name, v in phis.items()})
    params = tuple(parameters)
    ce = estimate_covariance(cov, jacobian=A @ Gsum, components=components, units=units,
                             parameters=params, small_sample=bool(small_sample))
    se = np.sqrt(np.diag(ce.cov))
    if not np.all(np.isfinite(theta)) or not np.all(np.isfinite(se)):
        raise InputError("estimation produced non-finite estimates or standard errors.")
    corrected = np.zeros(rows.n_rows, dtype=bool)
    for v in phis.values():
        corrected |= np.any(v != 0, axis=1)
    accounting = RowAccounting(
        n_rows=rows.n_rows, n_moment_rows=int(use.sum()), n_corrected=int((corrected & use).sum()),
        n_terminal=0, excluded={"moment not defined (NaN)": int((~use).sum())},
        dropped=dict(panel.dropped_rows),
    )
    fit = MomentFit(rows, mfun, fitted, riesz_fits, fold_of_row, units, n_g, theta, params)
    index = pd.Index(params, name="parameter")
    timings["total_s"] = time.perf_counter() - t_start
    hansen: HansenJ | NotApplicable = (
        result.hansen if result.hansen is not None
        else NotApplicable("the moment system is just-identified (as many moments as parameters)")
    )
    describe = "; ".join(f"{f.name}: {f.learner_name}" for f in fitted)
    riesz_text = (
        f"{riesz} Riesz regression (penalty {penalty:g}; dictionary sizes "
        + ", ".join(f"{r.name} {r.n_terms}" + (" + model probabilities" if r.model_probability else "")
                    for r in riesz_fits)
        + f"), next-row values {next_weights}"
        if riesz == "lasso" else f"learner-based Riesz fit ({riesz_learner}), next-row values {next_weights}"
    ) + (f"; weights at the estimate after {riesz_rounds} update(s)" if debias else "")
    details = MomentDetails(
        learner=describe, folds=int(folds), clip=float(clip),
        clipped={f.name: f.clipped for f in fitted if f.design.spec.binary},
        n_learner_fits=n_fits, iterations=iterations, n_moments=k,
        nuisances=tuple(f.name for f in fitted), correction=riesz_text,
        plugin_params=pd.Series(plug.theta, index=index, name="plug-in"), hansen=hansen, fit=fit,
    )
    return MomentResults(
        params=pd.Series(theta, index=index, name="estimate"),
        std_errors=pd.Series(se, index=index, name="std_error"),
        cov=pd.DataFrame(ce.cov, index=index, columns=index),
        debiased=bool(debias),
        model={"kind": "user moments", "n_moments": k, "nuisances": [f.name for f in fitted]},
        seed=int(seed), cov_type=cov, small_sample=bool(small_sample),
        n_units=panel.n_units, accounting=accounting,
        decomposition=ce.decomposition, influence=ce.influence,
        influence_units=ce.cluster_labels(panel.unit_labels),
        details=details, timings=timings, version=__version__,
    )


def _check_second_stage(*, riesz: Any, penalty: Any, next_weights: Any, cov: Any, debias: Any,
                        small_sample: Any, riesz_updates: Any, riesz_tol: Any) -> None:
    """The options of :func:`estimate_moments`'s correction and second stage."""
    check_method(riesz, penalty, next_weights)
    check_cov_name(cov)
    for name, flag in (("debias", debias), ("small_sample", small_sample)):
        if not isinstance(flag, (bool, np.bool_)):
            raise InputError(f"{name} must be True or False, got {flag!r}.")
    if isinstance(riesz_updates, bool) or not isinstance(riesz_updates, (int, np.integer)) or riesz_updates < 1:
        raise InputError(f"riesz_updates must be a positive integer, got {riesz_updates!r}.")
    if isinstance(riesz_tol, bool) or not isinstance(riesz_tol, (int, float)) or not (
        np.isfinite(riesz_tol) and riesz_tol > 0
    ):
        raise InputError(f"riesz_tol must be a positive number, got {riesz_tol!r}.")


@dataclass(frozen=True, eq=False)
class _FixedPoint:
    """The debiased solve whose Riesz weights were fitted at its own estimate."""

    result: GMMFit
    riesz_fits: list[RieszFit]
    phis: dict[str, np.ndarray]
    iterations: int
    rounds: int


def _riesz_fixed_point(
    solve_at: Callable[[np.ndarray], tuple[GMMFit, list[RieszFit], dict[str, np.ndarray]]],
    start: np.ndarray, *, updates: int, tol: float, memory: int,
) -> _FixedPoint:
    r"""The fixed point :math:`\theta = T(\theta)`, :math:`T(x)` = the debiased solve with the
    weights fitted at :math:`x`, by safeguarded Anderson-accelerated iteration.

    The weights of the last solve belong to the reported estimate
    (:math:`|T(x) - x| \le` ``tol``, relative). An accelerated point that fails to solve or
    moves more than the plain iteration did is replaced by the last plain image, and the
    history starts afresh. Warns when ``updates`` are used up (Walker & Ni 2011, SIAM J.
    Numer. Anal. 49, on Anderson acceleration).
    """
    x = start
    moved = np.inf
    history: list[tuple[np.ndarray, np.ndarray]] = []
    plain_next = x  # the last plain image T(x): where a rejected accelerated step goes
    accelerated = False
    iterations = 0
    result: GMMFit | None = None
    fits: list[RieszFit] = []
    phis: dict[str, np.ndarray] = {}
    for update in range(updates):
        try:
            result, fits, phis = solve_at(x)
        except EstimationError:
            if not accelerated:
                raise
            x, history, accelerated = plain_next, [], False
            continue
        iterations += result.iterations
        step = float(np.max(np.abs(result.theta - x) / (1.0 + np.abs(x))))
        if accelerated and step > moved:
            x, history, accelerated = plain_next, [], False
            continue
        moved = step
        if moved <= tol:
            break
        history.append((x, result.theta))
        plain_next = result.theta
        x = anderson_step(history, memory=memory)
        accelerated = not np.array_equal(x, plain_next)
    if moved > tol:
        warnings.warn(
            f"the Riesz weights did not reach a fixed point in riesz_updates={updates} "
            f"updates: the last update moved the estimate by {moved:.3g} (relative; "
            f"riesz_tol={tol:g}). Raise riesz_updates.",
            OrthoCCPWarning, stacklevel=3,
        )
    assert result is not None  # the first update either solves or raises
    return _FixedPoint(result, fits, phis, iterations, update + 1)
