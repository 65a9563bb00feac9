"""Estimation results: a frozen, typed record with tables, text, HTML, LaTeX and JSON views."""

from __future__ import annotations

import html
import json
import math
import os
from dataclasses import dataclass, field, fields
from functools import cached_property
from pathlib import Path
from collections.abc import Mapping
from typing import TYPE_CHECKING, Any, ClassVar

import numpy as np
import pandas as pd
from scipy import stats

from ._errors import InputError
from ._labels import plain_label, show_label
from .functions import Function, delta_method, function_lines

if TYPE_CHECKING:
    from .pieces import MomentPieces

__all__ = ["Results", "Details", "CrossFitDetails", "RowAccounting", "NotApplicable", "ASSUMPTIONS"]

ASSUMPTIONS = (
    "type-I extreme-value (logit) utility shocks, i.i.d. across choices and periods",
    "known discount factor",
    "finite dependence through the anchor choice (renewal or terminal)",
    "conditional independence: the next state depends on the current state and choice only",
    "stationarity: utilities, transitions and choice probabilities do not change over time",
)
"""The model's assumptions; the intervals' coverage holds only under them."""


def _short_list(names: list[str], *, limit: int = 6) -> str:
    """Names joined by commas; a long list shows its first three and last name and the count."""
    if len(names) <= limit:
        return ", ".join(names)
    return f"{', '.join(names[:3])}, ..., {names[-1]} ({len(names)} states)"


@dataclass(frozen=True)
class NotApplicable:
    """Marker for a statistic that does not apply, with the reason."""

    reason: str

    def __repr__(self) -> str:
        return f"NotApplicable({self.reason!r})"


@dataclass(frozen=True)
class RowAccounting:
    """Which rows entered the moments, and why the others did not.

    Attributes
    ----------
    n_rows : int
        Rows in the panel (all of them train the CCP learner).
    n_moment_rows : int
        Rows whose moment enters the estimation.
    n_corrected : int
        Moment rows whose next row enters the correction terms.
    n_terminal : int
        Moment rows where the terminal anchor was chosen (no next row needed).
    excluded : dict
        Reason -> number of rows not used as moment rows.
    dropped : dict
        Reason -> number of input rows the panel dropped before estimation
        (``Panel(missing="drop")``); empty when none were.
    """

    n_rows: int
    n_moment_rows: int
    n_corrected: int
    n_terminal: int
    excluded: dict[str, int]
    dropped: dict[str, int] = field(default_factory=dict)

    @property
    def n_input_rows(self) -> int:
        """Rows given to :class:`~orthoccp.Panel`, before any were dropped."""
        return self.n_rows + sum(self.dropped.values())

    def describe(self) -> str:
        parts = []
        if any(self.dropped.values()):
            reasons = ", ".join(f"{v} {k}" for k, v in self.dropped.items() if v)
            parts.append(
                f"{self.n_input_rows - self.n_rows} of {self.n_input_rows} input rows dropped "
                f"({reasons})"
            )
        parts.append(f"{self.n_moment_rows} of {self.n_rows} rows are moment rows")
        if self.n_terminal:
            parts.append(f"{self.n_terminal} of them chose the terminal anchor (no next row needed)")
        dropped = [f"{v} {k}" for k, v in self.excluded.items() if v]
        if dropped:
            parts.append("not used: " + ", ".join(dropped))
        return "; ".join(parts) + "."


_ROUTE_TEXT = {
    "newton": "damped Newton on the debiased moment",
    "root": "Powell hybrid root-finder (damped Newton failed)",
    "one_step": "one-step estimator from the plug-in solution (no root near it)",
    "plug-in": "plug-in pseudo-likelihood maximum",
}


def describe_routes(routes: tuple[str, ...]) -> str:
    """``"damped Newton ..."`` or, over several splits, the count of each route."""
    if not routes:
        return "not recorded"
    kinds = sorted(set(routes), key=routes.index)
    if len(kinds) == 1:
        text = _ROUTE_TEXT.get(kinds[0], kinds[0])
        return text if len(routes) == 1 else f"{text} (all {len(routes)} splits)"
    return "; ".join(
        f"{_ROUTE_TEXT.get(k, k)} in {routes.count(k)} of {len(routes)} splits" for k in kinds
    )


def json_number(x: float) -> float | None:
    """A finite float, or ``None`` for NaN and infinities (JSON has neither)."""
    x = float(x)
    return x if math.isfinite(x) else None


def estimates_block(title: list[str], table: pd.DataFrame, level: float, *,
                    label: str = "parameter") -> list[str]:
    """The estimates table of every summary, under its title lines.

    Parameters
    ----------
    title : list of str
        The lines above the table (method, model).
    table : pandas.DataFrame
        As :meth:`Results.to_frame` returns it.
    level : float
        Confidence level of the interval columns.
    label : str, default="parameter"
        Heading of the name column.

    Returns
    -------
    list of str
        The title, a rule, the header, the rows (one per parameter) and a closing rule.
    """
    pct = int(round(level * 100))
    head = (f"{label:<18}{'estimate':>11}{'std.err':>11}{'z':>8}{'p':>8}"
            f"{f'[{pct}% conf. int.]':>24}")
    lines = [*title, "=" * len(head), head, "-" * len(head)]
    for name, r in table.iterrows():
        lines.append(
            f"{str(name):<18}{r.estimate:>11.4f}{r.std_error:>11.4f}{r.z:>8.2f}{r.p_value:>8.3f}"
            f"{r.ci_lower:>12.4f}{r.ci_upper:>12.4f}"
        )
    lines.append("-" * len(head))
    return lines


def covariance_line(cov_type: str, small_sample: bool) -> str:
    """``covariance: <rule> by unit[ with n/(n-1) factor]``, the start of every summary's line."""
    return f"covariance: {cov_type} by unit" + (" with n/(n-1) factor" if small_sample else "")


def variance_share_lines(decomposition: pd.DataFrame, heading: str) -> list[str]:
    """The variance shares per parameter (nothing when there is one component)."""
    if decomposition.shape[1] <= 1:
        return []
    return [heading] + [
        f"  {str(name):<16}" + "  ".join(f"{c} {v:6.1%}" for c, v in r.items())
        for name, r in decomposition.iterrows()
    ]


def param_records(table: pd.DataFrame) -> list[dict[str, Any]]:
    """The ``params`` list of every results record's JSON: one JSON-safe record per row.

    Parameters
    ----------
    table : pandas.DataFrame
        Indexed by parameter, with columns ``estimate, std_error, ci_lower, ci_upper, z,
        p_value``.

    Returns
    -------
    list of dict
        ``name`` and the six numbers (NaN and infinities as ``None``).
    """
    columns = ("estimate", "std_error", "ci_lower", "ci_upper", "z", "p_value")
    return [{"name": str(k), **{c: json_number(r[c]) for c in columns}} for k, r in table.iterrows()]


RESULTS_FORMAT = "orthoccp.results/2"
"""Format tag of the results JSON (:meth:`Results.to_json`)."""


class Details:
    """The method-specific part of a result (:attr:`Results.details`).

    Every estimator's result is one :class:`Results` record: estimates, covariance, per-unit
    influence terms, row accounting and settings shared by all estimators, plus a frozen
    ``details`` record of the estimator's own facts (a subclass of this class). The details
    say how the result is named and summarised and how their part of the JSON reads.

    Subclasses set :attr:`kind` (the JSON tag) and :attr:`assumptions`, and implement
    :meth:`method`, :meth:`title`, :meth:`lines`, :meth:`to_dict` and :meth:`from_dict`.
    """

    kind: ClassVar[str] = ""
    assumptions: ClassVar[tuple[str, ...]] = ASSUMPTIONS
    not_rebuilt: ClassVar[tuple[str, ...]] = ()
    """Keys of :meth:`to_dict` whose records :meth:`from_dict` does not rebuild as objects; a
    reloaded result writes them back unchanged."""
    _kinds: ClassVar[dict[str, type[Details]]] = {}

    def __init_subclass__(cls, **kwargs: Any) -> None:
        super().__init_subclass__(**kwargs)
        if cls.kind:
            Details._kinds[cls.kind] = cls

    def method(self, debiased: bool) -> str:
        """The estimator's name, as the summary's first line shows it."""
        raise NotImplementedError

    def title(self, res: Results) -> str:
        """The line under the method: the model (or moment system) estimated."""
        raise NotImplementedError

    def lines(self, res: Results, *, plugin: bool) -> list[str]:
        """The summary's lines between the estimates and the assumptions."""
        raise NotImplementedError

    @property
    def hansen_j(self) -> Any:
        """Hansen's J: not applicable unless the estimator is over-identified."""
        return NotApplicable("the moment system is just-identified (as many moments as parameters)")

    def html(self, res: Results) -> str:
        """The notebook view: the estimates table, then the plain-text summary."""
        table = res.to_frame().to_html(float_format=lambda v: f"{v:.4f}", border=0)
        return (f"<div><p><b>orthoccp</b>: {html.escape(res.method)}</p>{table}"
                f"<pre>{html.escape(res.summary())}</pre></div>")

    def to_dict(self) -> dict[str, Any]:
        """The JSON-safe record of the details (``kind`` first)."""
        raise NotImplementedError

    @classmethod
    def from_dict(cls, doc: Mapping[str, Any], *, index: pd.Index,
                  std_errors: pd.Series) -> Details:
        """The inverse of :meth:`to_dict` (objects not rebuilt are left ``None``); ``index``
        and ``std_errors`` are the result's parameter names and standard errors."""
        raise NotImplementedError

    @staticmethod
    def read(doc: Mapping[str, Any], *, index: pd.Index, std_errors: pd.Series) -> Details:
        """The details record of a results JSON, by its ``kind``."""
        kind = doc.get("kind")
        if kind not in Details._kinds:
            raise InputError(
                f"unknown details kind {kind!r} in the results JSON; known: "
                f"{', '.join(sorted(Details._kinds))}."
            )
        return Details._kinds[str(kind)].from_dict(doc, index=index, std_errors=std_errors)


def _float(v: Any) -> float:
    """A JSON number back as a float (``None`` is NaN)."""
    return float("nan") if v is None else float(v)


@dataclass(frozen=True, eq=False)
class CrossFitDetails(Details):
    """Details of the cross-fitted CCP estimator (:func:`orthoccp.estimate`).

    Attributes
    ----------
    learner, regressor : str
        The CCP learner and the continuation regressor (``"-"`` when the nuisances were
        supplied or none were needed).
    folds, splits : int
        Folds by unit and independent fold splits (the estimate is the median over splits).
    scheme : str
        Cross-fitting scheme (``"plain"`` or ``"nested"``).
    clip : float
        Probabilities are clipped to ``[clip, 1 - clip]``; ``clipped`` counts rows per choice.
    n_learner_fits, iterations : int
        Learner fits, and Newton iterations of the second stage (all splits).
    split_params : pandas.DataFrame or None
        Per-split estimates (``splits`` > 1).
    split_spread : pandas.Series or None
        Per parameter, the standard deviation of the per-split estimates over the standard
        error: how much the fold split moves the answer.
    plugin_params : pandas.Series or None
        The plug-in estimates the debiased solve starts from (median over splits).
    nuisance_source : str
        Where the nuisances came from (cross-fitted, model-implied steps, supplied).
    model_ccp_steps : int
        Model-implied CCP steps after the cross-fitted first stage (0: none); the summary
        then labels ``plugin_params`` as the learner's first stage.
    moments : {"standard", "renewal_robust"}
        The moment solved; ``fallback`` names the parameters whose renewal-robust
        instrument fell back to the standard one, and why.
    correction_weights : {"solution", "plugin"}
        Where the corrections' weights were evaluated.
    solve_routes, solve_notes : tuple of str
        Per split, how the second stage was solved (``"newton"``, ``"root"``, ``"one_step"``,
        or ``"plug-in"`` when not debiased; :func:`orthoccp.solver.solve_orthogonal`) and
        why a fallback route was taken.
    diagnostics : Diagnostics or None
        Overlap, clipping and influence diagnostics (:mod:`orthoccp.diagnostics`).
    interval_check : IntervalCheck or None
        Signs that a parameter's normal interval may not hold (:mod:`orthoccp.interval_checks`);
        None for the plug-in estimator.
    pieces : tuple of MomentPieces
        Per split, the per-row pieces of the moment (:meth:`moment_pieces`); empty when
        reloaded from JSON.
    """

    kind: ClassVar[str] = "cross-fit"
    not_rebuilt: ClassVar[tuple[str, ...]] = ("diagnostics", "interval_check")

    learner: str
    regressor: str
    folds: int
    splits: int
    scheme: str
    clip: float
    clipped: dict[str, int]
    n_learner_fits: int = 0
    iterations: int = 0
    split_params: pd.DataFrame | None = field(default=None, repr=False)
    split_spread: pd.Series | None = field(default=None, repr=False)
    plugin_params: pd.Series | None = None
    nuisance_source: str = "cross-fitted"
    model_ccp_steps: int = 0
    moments: str = "standard"
    correction_weights: str = "solution"
    fallback: dict[str, str] = field(default_factory=dict)
    solve_routes: tuple[str, ...] = ()
    solve_notes: tuple[str, ...] = ()
    diagnostics: Any = field(default=None, repr=False)
    interval_check: Any = field(default=None, repr=False)
    pieces: tuple[MomentPieces, ...] = field(default=(), repr=False)

    @staticmethod
    def spread(split_params: pd.DataFrame | None, std_errors: pd.Series) -> pd.Series | None:
        """SD of the per-split estimates over the standard error (None for one split)."""
        if split_params is None or len(split_params) < 2:
            return None
        return (split_params.std(axis=0, ddof=1) / std_errors).rename("split_spread")

    @property
    def solution(self) -> str:
        """One line on how the second stage was solved (all splits)."""
        return describe_routes(self.solve_routes)

    def moment_pieces(self, split: int = 1) -> MomentPieces:
        r"""The per-row pieces of the moment the estimate solved (one fold split).

        Parameters
        ----------
        split : int, default=1
            Which fold split (1 to ``splits``).

        Returns
        -------
        MomentPieces
            Constructed regressors :math:`X_j`, offsets :math:`o_j`, instruments
            :math:`A_j`, and :math:`m`, :math:`\phi_\mu`, :math:`\phi_P`, :math:`\psi` at
            the split's solution or any :math:`\theta` (:mod:`orthoccp.pieces`).
        """
        if not self.pieces:
            raise InputError(
                "this result holds no per-row moment pieces: a result reloaded from JSON does "
                "not keep them; rerun orthoccp.estimate."
            )
        if isinstance(split, bool) or not isinstance(split, (int, np.integer)) or not (
                1 <= split <= len(self.pieces)):
            raise InputError(f"split must be an integer from 1 to {len(self.pieces)}, got {split!r}.")
        return self.pieces[int(split) - 1]

    def method(self, debiased: bool) -> str:
        if debiased:
            return "orthogonal (debiased) CCP estimator"
        return "plug-in CCP estimator (NOT debiased; standard errors ignore first-stage noise)"

    def title(self, res: Results) -> str:
        return (f"model: {res.model['kind']}, anchor {show_label(res.model['anchor'])}, "
                f"discount {res.model['discount']}")

    def lines(self, res: Results, *, plugin: bool) -> list[str]:
        lines = []
        if res.reloaded is not None:
            lines.append("reloaded from JSON: the diagnostics and interval checks are records in "
                         ".to_dict(); the per-row moment pieces are not kept")
        lines.append(f"units {res.n_units}; {res.accounting.describe()}")
        lines.append(
            f"first stage: {self.nuisance_source}; CCP learner {self.learner}, continuation "
            f"regressor {self.regressor}; {self.folds} folds by unit, {self.splits} split(s), "
            f"scheme {self.scheme}, seed {res.seed}; {self.n_learner_fits} learner fits"
        )
        clipped = ", ".join(f"{k}: {v}" for k, v in self.clipped.items())
        lines.append(f"probabilities clipped to [{self.clip:g}, {1 - self.clip:g}]; rows "
                     f"clipped per choice: {clipped}")
        lines.append(covariance_line(res.cov_type, res.small_sample)
                     + ("" if res.debiased else " (first-stage noise ignored)"))
        if self.moments == "renewal_robust":
            lines.append(
                "moments: renewal_robust (instruments residualised on the persistent states "
                + _short_list([str(x) for x in res.model.get("persistent", [])])
                + "; assumes a renewal does not reset them)"
            )
            lines.extend(f"  {name}: {why}" for name, why in self.fallback.items())
        elif res.debiased:
            lines.append("moments: standard (pseudo-likelihood score with the full correction)")
        if res.debiased and self.correction_weights == "plugin":
            lines.append("corrections: weights fixed at the plug-in solution")
        if self.split_spread is not None:
            lines.append(
                f"fold splits: across {self.splits} splits the estimates spread by "
                + ", ".join(f"{k} {v:.2f}" for k, v in self.split_spread.items())
                + " standard errors (standard deviation over s.e.; the reported estimate is "
                "their median and the variance includes the spread)"
            )
        if self.solve_routes:
            lines.append(f"solution: {self.solution}")
            lines.extend(f"  split {k + 1}: {' '.join(note.split())}"
                         for k, note in enumerate(self.solve_notes) if note)
        stepped = self.model_ccp_steps > 0
        if plugin and self.plugin_params is not None and (res.debiased or stepped):
            if stepped:
                label = ("plug-in estimates (the learner's first stage, before the model-implied "
                         "steps): ")
            elif self.moments == "renewal_robust":
                label = ("plug-in estimates (start of the solve; the anchor's continuation is fit "
                         "on the persistent states only, as the renewal-robust moment needs): ")
            else:
                label = "plug-in estimates (start of the solve): "
            lines.append(label + ", ".join(f"{k} {v:.4f}" for k, v in self.plugin_params.items()))
        lines.extend(variance_share_lines(
            res.decomposition, "variance shares, Cov(part, psi)/Var(psi), adding up to 100% "
            "(m: identifying moment, phi_mu: continuation correction, phi_P: CCP correction):"))
        if self.interval_check is not None:
            lines.extend(self.interval_check.readings())
        if self.diagnostics is not None:
            lines.append("diagnostics (see .diagnostics for the tables):")
            lines.extend(f"  {r}" for r in self.diagnostics.readings())
        lines.append(f"Hansen J: not applicable ({self.hansen_j.reason}).")
        return lines

    def html(self, res: Results) -> str:
        table = res.to_frame().to_html(float_format=lambda v: f"{v:.4f}", border=0)
        assumptions = "".join(f"<li>{a}</li>" for a in self.assumptions)
        return (
            f"<div><p><b>orthoccp</b>: {res.method}; model {res.model['kind']}, anchor "
            f"{show_label(res.model['anchor'])}, discount {res.model['discount']}</p>{table}"
            f"<p>units {res.n_units}; {res.accounting.describe()}<br>learner {self.learner}; "
            f"{self.folds} folds, {self.splits} split(s), seed {res.seed}</p>"
            f"<p>Coverage holds only under the assumptions:</p><ul>{assumptions}</ul></div>"
        )

    def to_dict(self) -> dict[str, Any]:
        return {
            "kind": self.kind,
            "learner": self.learner,
            "regressor": self.regressor,
            "folds": self.folds,
            "splits": self.splits,
            "scheme": self.scheme,
            "clip": self.clip,
            "clipped": {str(k): int(v) for k, v in self.clipped.items()},
            "n_learner_fits": self.n_learner_fits,
            "iterations": self.iterations,
            "nuisance_source": self.nuisance_source,
            "model_ccp_steps": self.model_ccp_steps,
            "moments": self.moments,
            "correction_weights": self.correction_weights,
            "moments_fallback": dict(self.fallback),
            "solution": {"routes": list(self.solve_routes), "notes": list(self.solve_notes),
                         "summary": self.solution},
            "plugin_params": (None if self.plugin_params is None else
                              {str(k): json_number(v) for k, v in self.plugin_params.items()}),
            "split_params": (None if self.split_params is None else
                             [[json_number(v) for v in row] for row in self.split_params.to_numpy()]),
            "interval_check": (None if self.interval_check is None
                               else self.interval_check.to_dict()),
            "diagnostics": None if self.diagnostics is None else self.diagnostics.to_dict(),
        }

    @classmethod
    def from_dict(cls, doc: Mapping[str, Any], *, index: pd.Index,
                  std_errors: pd.Series) -> CrossFitDetails:
        split, plugin = doc.get("split_params"), doc.get("plugin_params")
        split_params = plugin_params = None
        if split is not None:
            split_params = pd.DataFrame([[_float(v) for v in row] for row in split], columns=index)
        if plugin is not None:
            plugin_params = pd.Series([_float(plugin[n]) for n in index], index=index,
                                      name="plug-in")
        solution = doc.get("solution") or {}
        return cls(
            learner=str(doc["learner"]), regressor=str(doc["regressor"]),
            folds=int(doc["folds"]), splits=int(doc["splits"]), scheme=str(doc["scheme"]),
            clip=float(doc["clip"]),
            clipped={str(k): int(v) for k, v in doc.get("clipped", {}).items()},
            n_learner_fits=int(doc.get("n_learner_fits", 0)),
            iterations=int(doc.get("iterations", 0)),
            split_params=split_params,
            split_spread=cls.spread(split_params, std_errors),
            plugin_params=plugin_params,
            nuisance_source=str(doc.get("nuisance_source", "")),
            model_ccp_steps=int(doc.get("model_ccp_steps", 0)),
            moments=str(doc.get("moments", "standard")),
            correction_weights=str(doc.get("correction_weights", "solution")),
            fallback={str(k): str(v) for k, v in doc.get("moments_fallback", {}).items()},
            solve_routes=tuple(solution.get("routes", ())),
            solve_notes=tuple(solution.get("notes", ())),
        )


def cross_fit_details(res: Results, *, needed_by: str) -> CrossFitDetails:
    """The :class:`CrossFitDetails` of a result of :func:`orthoccp.estimate`.

    Raises
    ------
    InputError
        When ``res`` came from another estimator; the message names ``needed_by``.
    """
    if not isinstance(res.details, CrossFitDetails):
        raise InputError(
            f"{needed_by} needs a result of orthoccp.estimate (the cross-fitted CCP estimator); "
            f"got one of {res.method!r}."
        )
    return res.details


_RESULT_TYPES: dict[str, type[Results]] = {}


@dataclass(frozen=True, eq=False)
class Results:
    """Results of an estimation: one frozen record for every estimator.

    The fields below are shared by every estimator; the estimator's own facts are in
    :attr:`details` (:class:`CrossFitDetails` for :func:`orthoccp.estimate`; the user-moment
    and discrete estimators' details records for theirs). Reading ``res.<name>`` for a name
    of the details (``res.folds``, ``res.converged``) returns ``res.details.<name>``; a name
    the estimator does not have raises :class:`AttributeError` saying so.

    Attributes
    ----------
    params, std_errors : pandas.Series
        Estimates and standard errors, indexed by parameter name.
    cov : pandas.DataFrame
        Covariance matrix of the estimates.
    debiased : bool
        True for the orthogonal (locally robust) estimator; False for the plug-in one, whose
        standard errors ignore first-stage estimation noise.
    model : dict
        The model (or moment system) estimated, as a JSON-safe record.
    seed : int
        The seed that drove every fold split and learner.
    cov_type, small_sample : str, bool
        Covariance rule (:func:`orthoccp.covariance_names`) and whether the n/(n-1)
        factor was applied.
    n_units : int
        Units (clusters).
    accounting : RowAccounting
        Which rows entered the moments, and why the others did not.
    decomposition : pandas.DataFrame
        Share of each parameter's variance from each part of the influence term: each
        part's covariance with the influence term over its variance, so the shares add up
        to one (a share is negative when the part offsets the others).
    influence : numpy.ndarray
        Per-unit influence terms (n_units x p); ``cov`` is their outer-product sum times the
        small-sample factor. ``influence_units`` holds the matching unit labels.
    details : Details
        The estimator's own facts, settings and renderings.
    timings : dict
        Seconds per stage.
    version : str
        orthoccp version that produced the result.
    reloaded : dict or None
        The JSON record a result read by :meth:`from_json` came from.
    """

    params: pd.Series
    std_errors: pd.Series
    cov: pd.DataFrame
    debiased: bool
    model: dict[str, Any]
    seed: int
    cov_type: str
    small_sample: bool
    n_units: int
    accounting: RowAccounting
    decomposition: pd.DataFrame
    influence: np.ndarray = field(repr=False)
    influence_units: np.ndarray = field(repr=False)
    details: Details = field(repr=False)
    timings: dict[str, float] = field(default_factory=dict)
    version: str = ""
    reloaded: dict[str, Any] | None = field(default=None, repr=False)

    def __init_subclass__(cls, **kwargs: Any) -> None:
        super().__init_subclass__(**kwargs)
        _RESULT_TYPES[cls.__name__] = cls

    def __getattr__(self, name: str) -> Any:
        # Called only when normal lookup fails: forward reads to the details record.
        details = self.__dict__.get("details")
        if details is None or name.startswith("_"):
            raise AttributeError(name)
        try:
            return getattr(details, name)
        except AttributeError:
            raise AttributeError(
                f"{type(self).__name__} has no attribute {name!r}: it is neither a field of "
                f"every result nor one of this estimator's details ({type(details).__name__}: "
                f"{', '.join(f.name for f in fields(details))})."
            ) from None

    # ----------------------------------------------------------------- statistics
    @cached_property
    def zstats(self) -> pd.Series:
        """:math:`\\hat\\theta / \\mathrm{se}`."""
        return (self.params / self.std_errors).rename("z")

    @cached_property
    def pvalues(self) -> pd.Series:
        """Two-sided normal p-values of :math:`H_0: \\theta_k = 0`."""
        return pd.Series(2 * stats.norm.sf(np.abs(self.zstats)), index=self.params.index, name="p")

    @property
    def hansen_j(self) -> Any:
        """Hansen's J (:class:`~orthoccp.custom.HansenJ`), or :class:`NotApplicable` with the
        reason (the built-in moment systems are just-identified)."""
        return self.details.hansen_j

    @property
    def n_rows(self) -> int:
        return self.accounting.n_rows

    @property
    def n_moment_rows(self) -> int:
        return self.accounting.n_moment_rows

    def conf_int(self, level: float = 0.95) -> pd.DataFrame:
        """Normal-approximation confidence intervals with columns ``lower`` and ``upper``."""
        if (isinstance(level, (bool, np.bool_)) or not isinstance(level, (int, float, np.integer, np.floating))
                or not 0 < level < 1):
            raise InputError(
                f"level must be a number in (0, 1) such as 0.95, got {level!r} "
                f"({type(level).__name__})."
            )
        z = stats.norm.ppf(0.5 + level / 2)
        return pd.DataFrame(
            {"lower": self.params - z * self.std_errors, "upper": self.params + z * self.std_errors}
        )

    def to_frame(self, level: float = 0.95) -> pd.DataFrame:
        """Tidy table: one row per parameter."""
        ci = self.conf_int(level)
        return pd.DataFrame(
            {
                "estimate": self.params,
                "std_error": self.std_errors,
                "z": self.zstats,
                "p_value": self.pvalues,
                "ci_lower": ci["lower"],
                "ci_upper": ci["upper"],
            }
        ).rename_axis("parameter")

    # ----------------------------------------------------------------- views
    @property
    def method(self) -> str:
        """The estimator's name (from :attr:`details`)."""
        return self.details.method(self.debiased)

    def derive(self, functions: Mapping[str, Function], *, level: float = 0.95) -> pd.DataFrame:
        r"""Functions of the parameters with delta-method standard errors and intervals.

        Parameters
        ----------
        functions : mapping
            Name -> an expression over parameter names such as ``"wear_cost / swap_cost"``
            (``+ - * / **``, numbers, ``exp``, ``log``, ``sqrt``), or a callable of the
            parameter Series returning a number.
        level : float, default=0.95
            Confidence level.

        Returns
        -------
        pandas.DataFrame
            One row per function, with the columns of :meth:`to_frame`.

        Notes
        -----
        :math:`\mathrm{se}(g) = \sqrt{\nabla g(\hat\theta)'\hat V\nabla g(\hat\theta)}` with
        this result's covariance :math:`\hat V` (the same influence terms and clustering) and
        a central-difference gradient (:func:`orthoccp.functions.delta_method`; Newey &
        McFadden 1994, §3). First order: a ratio whose denominator is within a few standard
        errors of zero gets a warning.

        Examples
        --------
        >>> res.derive({"wear_in_swaps": "wear_cost / swap_cost"})  # doctest: +SKIP
        """
        return delta_method(self.params, self.cov, functions, level=level)[0]

    def summary(self, level: float = 0.95, *, plugin: bool = True,
                functions: Mapping[str, Function] | None = None) -> str:
        """Plain-text summary: estimates, sample, settings, variance sources, assumptions.

        Parameters
        ----------
        level : float, default=0.95
            Confidence level of the intervals.
        plugin : bool, default=True
            Include the line with the plug-in estimates that a debiased solve starts from
            (leave it out when a separate plug-in estimate is shown beside the summary).
        functions : mapping, optional
            Functions of the parameters shown under the estimates, with delta-method
            intervals (:meth:`derive`).
        """
        lines = estimates_block([f"orthoccp {self.version}: {self.method}",
                                 self.details.title(self)], self.to_frame(level), level)
        if functions is not None:
            lines += function_lines(self.derive(functions, level=level), level)
        lines += self.details.lines(self, plugin=plugin)
        lines.append("Inference is valid only under the model's assumptions:")
        lines.extend(f"  - {a}" for a in self.details.assumptions)
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.summary()

    def _repr_html_(self) -> str:
        return self.details.html(self)

    def to_latex(self, level: float = 0.95) -> str:
        """A booktabs-style LaTeX table of estimates and standard errors."""
        t = self.to_frame(level)
        rows = [
            f"{str(k).replace('_', chr(92) + '_')} & {r.estimate:.4f} & ({r.std_error:.4f}) & "
            f"[{r.ci_lower:.4f}, {r.ci_upper:.4f}] \\\\"
            for k, r in t.iterrows()
        ]
        return "\n".join(
            [
                "\\begin{tabular}{lrrr}",
                "\\toprule",
                f"Parameter & Estimate & Std. error & {int(level * 100)}\\% interval \\\\",
                "\\midrule",
                *rows,
                "\\bottomrule",
                "\\end{tabular}",
            ]
        )

    def to_dict(self, level: float = 0.95) -> dict[str, Any]:
        """JSON-safe dictionary (NaN and infinities become ``None``).

        Holds every number of the result, the per-unit influence terms included
        (``influence``: unit labels and an n_units x p table), so :meth:`from_dict` rebuilds
        it. The estimator's own facts are under ``details`` (with their ``kind``). A reloaded
        result writes back unchanged the records it did not rebuild (diagnostics, interval
        checks) and those its writer added (the command line's ``inputs``).
        """
        t = self.to_frame(level)
        details = self.details.to_dict()
        if self.reloaded is not None:
            kept = self.reloaded.get("details") or {}
            for key in self.details.not_rebuilt:
                details[key] = kept.get(key)
        hansen = self.hansen_j
        out = {
            "format": RESULTS_FORMAT,
            "result_type": type(self).__name__,
            "method": self.method,
            "version": self.version,
            "params": param_records(t),
            "level": level,
            "debiased": self.debiased,
            "model": {k: (v if k != "anchor" else str(v)) for k, v in self.model.items()},
            "seed": self.seed,
            "n_units": self.n_units,
            "n_rows": self.accounting.n_rows,
            "n_moment_rows": self.accounting.n_moment_rows,
            "n_corrected": self.accounting.n_corrected,
            "n_terminal": self.accounting.n_terminal,
            "rows_excluded": dict(self.accounting.excluded),
            "rows_dropped": dict(self.accounting.dropped),
            "cov_type": self.cov_type,
            "small_sample": self.small_sample,
            "cov": [[json_number(v) for v in row] for row in self.cov.to_numpy()],
            "variance_shares": {
                str(p): {c: json_number(v) for c, v in row.items()}
                for p, row in self.decomposition.iterrows()
            },
            "hansen_j": (
                {"applicable": False, "reason": hansen.reason} if isinstance(hansen, NotApplicable)
                else {"applicable": True, "statistic": json_number(hansen.statistic),
                      "df": int(hansen.df), "p_value": json_number(hansen.pvalue)}
            ),
            "assumptions": list(self.details.assumptions),
            "timings": {k: json_number(v) for k, v in self.timings.items()},
            "influence": {
                "units": [plain_label(u) for u in self.influence_units],
                "values": [[json_number(v) for v in row] for row in np.asarray(self.influence)],
            },
            "details": details,
        }
        if self.reloaded is not None:  # records added by the writer (the command line's inputs)
            out.update({k: v for k, v in self.reloaded.items() if k not in out})
        return out

    def to_json(self, level: float = 0.95, **kwargs: Any) -> str:
        """:meth:`to_dict` serialised (``allow_nan=False``: never writes NaN).

        :meth:`from_json` reads it back: every number (estimates, covariance, per-unit
        influence terms, split estimates, variance shares) round-trips exactly.
        """
        return json.dumps(self.to_dict(level), allow_nan=False, **kwargs)

    @classmethod
    def from_json(cls, source: str | bytes | os.PathLike[str]) -> Results:
        """A result written by :meth:`to_json` (or ``orthoccp estimate --json``), read back.

        Parameters
        ----------
        source : str, bytes or path
            The JSON text, or the path of a file holding it.

        Returns
        -------
        Results
            Of the type that was written (:class:`Results`, or the user-moment or discrete
            estimator's), with the numbers of the original (estimates, covariance, influence
            terms, settings, row accounting), so :func:`~orthoccp.difference_test`,
            :meth:`derive` and the summary work on it. Objects that are not rebuilt
            (diagnostics tables, interval checks, the per-row moment pieces, the discrete
            estimator's state-space solution) are left out; the JSON records of the first
            two are kept, and :meth:`to_dict` writes them back unchanged.
        """
        if isinstance(source, os.PathLike) or (isinstance(source, str) and not source.lstrip().startswith("{")):
            path = Path(source)
            try:
                text = path.read_text(encoding="utf-8")
            except OSError as exc:
                raise InputError(f"cannot read results file {str(path)!r}: {exc.strerror or exc}.") from exc
        else:
            text = source.decode("utf-8") if isinstance(source, bytes) else source
        try:
            doc = json.loads(text)
        except json.JSONDecodeError as exc:
            raise InputError(f"the results JSON does not parse: {exc}.") from exc
        return cls.from_dict(doc)

    @classmethod
    def from_dict(cls, doc: Mapping[str, Any]) -> Results:
        """The inverse of :meth:`to_dict` (see :meth:`from_json`)."""
        if not isinstance(doc, Mapping) or doc.get("format") != RESULTS_FORMAT:
            found = doc.get("format") if isinstance(doc, Mapping) else type(doc).__name__
            raise InputError(
                f"not an orthoccp results record of this version (format {found!r}; expected "
                f"{RESULTS_FORMAT!r}); write it again with Results.to_json or 'orthoccp "
                f"estimate --json'."
            )
        names = [p["name"] for p in doc["params"]]
        index = pd.Index(names, name="parameter")
        std_errors = pd.Series([_float(p["std_error"]) for p in doc["params"]], index=index,
                               name="std_error")
        cov = np.array([[_float(v) for v in row] for row in doc["cov"]], dtype=np.float64)
        infl = doc["influence"]
        shares = doc.get("variance_shares") or {}
        decomposition = pd.DataFrame(
            {c: [_float(shares[p][c]) for p in names]
             for c in (shares[names[0]] if names and names[0] in shares else {})},
            index=pd.Index(names),
        )
        accounting = RowAccounting(
            n_rows=int(doc["n_rows"]), n_moment_rows=int(doc["n_moment_rows"]),
            n_corrected=int(doc["n_corrected"]), n_terminal=int(doc["n_terminal"]),
            excluded={str(k): int(v) for k, v in doc.get("rows_excluded", {}).items()},
            dropped={str(k): int(v) for k, v in doc.get("rows_dropped", {}).items()},
        )
        details = Details.read(doc["details"], index=index, std_errors=std_errors)
        result_type = _RESULT_TYPES.get(str(doc.get("result_type")), Results)
        return result_type(
            params=pd.Series([_float(p["estimate"]) for p in doc["params"]], index=index,
                             name="estimate"),
            std_errors=std_errors,
            cov=pd.DataFrame(cov, index=index, columns=index),
            debiased=bool(doc["debiased"]),
            model=dict(doc["model"]),
            seed=int(doc["seed"]),
            cov_type=str(doc["cov_type"]),
            small_sample=bool(doc["small_sample"]),
            n_units=int(doc["n_units"]),
            accounting=accounting,
            decomposition=decomposition,
            influence=np.array([[_float(v) for v in row] for row in infl["values"]],
                               dtype=np.float64).reshape(len(infl["units"]), len(names)),
            influence_units=np.array(infl["units"], dtype=object),
            details=details,
            timings={str(k): _float(v) for k, v in doc.get("timings", {}).items()},
            version=str(doc.get("version", "")),
            reloaded=dict(doc),
        )


_RESULT_TYPES["Results"] = Results
