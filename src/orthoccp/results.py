"""Estimation results: a frozen, typed record with tables, text, HTML, LaTeX and JSON views."""

from __future__ import annotations

import html
import json
import math
import os
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from collections.abc import Mapping
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
from scipy import stats

from ._errors import InputError
from ._labels import plain_label, show_label
from .functions import Function, delta_method, function_lines

if TYPE_CHECKING:
    from .pieces import MomentPieces

__all__ = ["Results", "RowAccounting", "NotApplicable", "ASSUMPTIONS"]

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


RESULTS_FORMAT = "orthoccp.results/1"
"""Format tag of the results JSON (:meth:`Results.to_json`)."""

_NOT_REBUILT = ("diagnostics", "interval_check", "hansen_j", "assumptions", "method",
                "result_type", "solution")


@dataclass(frozen=True, eq=False)
class Results:
    """Results of a CCP estimation.

    Attributes
    ----------
    params, std_errors : pandas.Series
        Estimates and standard errors, indexed by parameter name.
    cov : pandas.DataFrame
        Covariance matrix of the estimates.
    debiased : bool
        True for the orthogonal (locally robust) estimator; False for the plug-in one, whose
        standard errors ignore first-stage estimation noise.
    decomposition : pandas.DataFrame
        Share of each parameter's variance from the identifying moment ``m``, the continuation
        correction ``phi_mu`` and the CCP correction ``phi_P``: each component's covariance
        with the influence term over its variance, so the shares add up to one (a share is
        negative when the component offsets the others).
    influence : numpy.ndarray
        Per-unit influence terms (n_units x p); ``cov`` is their outer-product sum times the
        small-sample factor. ``influence_units`` holds the matching unit labels.
    solve_routes, solve_notes : tuple of str
        Per split, how the second stage was solved (``"newton"``, ``"root"``, ``"one_step"``,
        or ``"plug-in"`` when not debiased; see :func:`orthoccp.solver.solve_orthogonal`) and
        why a fallback route was taken.
    interval_check : IntervalCheck or None
        Signs that a parameter's normal interval may not hold (:mod:`orthoccp.interval_checks`);
        None for the plug-in estimator.
    model_ccp_steps : int
        Model-implied CCP steps after the cross-fitted first stage (0: none); the summary
        then labels ``plugin_params`` as the learner's first stage.
    correction_weights : {"solution", "plugin"}
        Where the corrections' weights were evaluated (:func:`orthoccp.estimate`).
    """

    params: pd.Series
    std_errors: pd.Series
    cov: pd.DataFrame
    debiased: bool
    model: dict[str, Any]
    learner: str
    regressor: str
    folds: int
    splits: int
    scheme: str
    seed: int
    clip: float
    cov_type: str
    small_sample: bool
    n_units: int
    accounting: RowAccounting
    clipped: dict[str, int]
    decomposition: pd.DataFrame
    influence: np.ndarray = field(repr=False)
    influence_units: np.ndarray = field(repr=False)
    timings: dict[str, float] = field(default_factory=dict)
    n_learner_fits: int = 0
    iterations: int = 0
    split_params: pd.DataFrame | None = field(default=None, repr=False)
    plugin_params: pd.Series | None = None
    nuisance_source: str = "cross-fitted"
    model_ccp_steps: int = 0
    moments: str = "standard"
    correction_weights: str = "solution"
    diagnostics: Any = field(default=None, repr=False)
    fallback: dict[str, str] = field(default_factory=dict)
    solve_routes: tuple[str, ...] = ()
    solve_notes: tuple[str, ...] = ()
    interval_check: Any = field(default=None, repr=False)
    version: str = ""
    pieces: tuple[MomentPieces, ...] = field(default=(), repr=False)
    reloaded: dict[str, Any] | None = field(default=None, repr=False)

    @cached_property
    def split_spread(self) -> pd.Series | None:
        """Per parameter, the standard deviation of the per-split estimates over the standard
        error (``splits`` > 1; None otherwise): how much the fold split moves the answer."""
        if self.split_params is None or len(self.split_params) < 2:
            return None
        sd = self.split_params.std(axis=0, ddof=1)
        return (sd / self.std_errors).rename("split_spread")

    @property
    def solution(self) -> str:
        """One line on how the second stage was solved (all splits)."""
        return describe_routes(self.solve_routes)

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
    def hansen_j(self) -> NotApplicable:
        """Hansen's J: the built-in moment systems are just-identified."""
        return NotApplicable("the moment system is just-identified (as many moments as parameters)")

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
        if self.reloaded is not None and "method" in self.reloaded:
            return str(self.reloaded["method"])
        if self.debiased:
            return "orthogonal (debiased) CCP estimator"
        return "plug-in CCP estimator (NOT debiased; standard errors ignore first-stage noise)"

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
                "this result holds no per-row moment pieces: they are kept by "
                "orthoccp.estimate (not by user moments, discrete estimators or reloaded "
                "results)."
            )
        if isinstance(split, bool) or not isinstance(split, (int, np.integer)) or not (
                1 <= split <= len(self.pieces)):
            raise InputError(f"split must be an integer from 1 to {len(self.pieces)}, got {split!r}.")
        return self.pieces[int(split) - 1]

    def _function_block(self, functions: Mapping[str, Function] | None, level: float) -> list[str]:
        if functions is None:
            return []
        return function_lines(self.derive(functions, level=level), level)

    def summary(self, level: float = 0.95, *, plugin: bool = True,
                functions: Mapping[str, Function] | None = None) -> str:
        """Plain-text summary: estimates, sample, first stage, variance sources, assumptions.

        Parameters
        ----------
        level : float, default=0.95
            Confidence level of the intervals.
        plugin : bool, default=True
            Include the line with the plug-in estimates that the debiased solve starts from
            (leave it out when a separate plug-in estimate is shown beside the summary).
        functions : mapping, optional
            Functions of the parameters shown under the estimates, with delta-method
            intervals (:meth:`derive`).
        """
        if self.reloaded is not None and self.reloaded.get("result_type") != "Results":
            return self._reloaded_summary(level, functions)
        lines = estimates_block([
            f"orthoccp {self.version}: {self.method}",
            f"model: {self.model['kind']}, anchor {show_label(self.model['anchor'])}, discount {self.model['discount']}",
        ], self.to_frame(level), level) + self._function_block(functions, level)
        if self.reloaded is not None:
            lines.append("reloaded from JSON: the diagnostics and interval checks are records in "
                         ".to_dict(); the per-row moment pieces are not kept")
        lines.append(f"units {self.n_units}; {self.accounting.describe()}")
        fs = (
            f"first stage: {self.nuisance_source}; CCP learner {self.learner}, continuation "
            f"regressor {self.regressor}; {self.folds} folds by unit, {self.splits} split(s), "
            f"scheme {self.scheme}, seed {self.seed}; {self.n_learner_fits} learner fits"
        )
        lines.append(fs)
        clipped = ", ".join(f"{k}: {v}" for k, v in self.clipped.items())
        lines.append(f"probabilities clipped to [{self.clip:g}, {1 - self.clip:g}]; rows clipped per choice: {clipped}")
        lines.append(covariance_line(self.cov_type, self.small_sample)
                     + ("" if self.debiased else " (first-stage noise ignored)"))
        if self.moments == "renewal_robust":
            lines.append(
                "moments: renewal_robust (instruments residualised on the persistent states "
                + _short_list([str(x) for x in self.model.get("persistent", [])])
                + "; assumes a renewal does not reset them)"
            )
            for name, why in self.fallback.items():
                lines.append(f"  {name}: {why}")
        elif self.debiased:
            lines.append("moments: standard (pseudo-likelihood score with the full correction)")
        if self.debiased and self.correction_weights == "plugin":
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
            for k, note in enumerate(self.solve_notes):
                if note:
                    lines.append(f"  split {k + 1}: {' '.join(note.split())}")
        stepped = self.model_ccp_steps > 0
        if plugin and self.plugin_params is not None and (self.debiased or stepped):
            if stepped:
                label = ("plug-in estimates (the learner's first stage, before the model-implied "
                         "steps): ")
            elif self.moments == "renewal_robust":
                label = ("plug-in estimates (start of the solve; the anchor's continuation is fit "
                         "on the persistent states only, as the renewal-robust moment needs): ")
            else:
                label = "plug-in estimates (start of the solve): "
            lines.append(
                label + ", ".join(f"{k} {v:.4f}" for k, v in self.plugin_params.items())
            )
        lines.extend(variance_share_lines(
            self.decomposition, "variance shares, Cov(part, psi)/Var(psi), adding up to 100% "
            "(m: identifying moment, phi_mu: continuation correction, phi_P: CCP correction):"))
        if self.interval_check is not None:
            lines.extend(self.interval_check.readings())
        if self.diagnostics is not None:
            lines.append("diagnostics (see .diagnostics for the tables):")
            lines.extend(f"  {r}" for r in self.diagnostics.readings())
        lines.append(f"Hansen J: not applicable ({self.hansen_j.reason}).")
        lines.append("Inference is valid only under the model's assumptions:")
        lines.extend(f"  - {a}" for a in ASSUMPTIONS)
        return "\n".join(lines)

    def _reloaded_summary(self, level: float, functions: Mapping[str, Function] | None) -> str:
        """The summary of a reloaded user-moment or discrete result: its numbers and settings."""
        doc = self.reloaded or {}
        lines = estimates_block([f"orthoccp {self.version}: {self.method}",
                                 f"reloaded from JSON ({doc.get('result_type')})"],
                                self.to_frame(level), level) + self._function_block(functions, level)
        lines.append(f"units {self.n_units}; {self.accounting.describe()}")
        lines.append(covariance_line(self.cov_type, self.small_sample))
        lines.append("Inference is valid only under the assumptions:")
        lines.extend(f"  - {a}" for a in doc.get("assumptions", ASSUMPTIONS))
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.summary()

    def _repr_html_(self) -> str:
        table = self.to_frame().to_html(float_format=lambda v: f"{v:.4f}", border=0)
        assumptions = "".join(f"<li>{a}</li>" for a in ASSUMPTIONS)
        return (
            f"<div><p><b>orthoccp</b>: {self.method}; model {self.model['kind']}, anchor "
            f"{show_label(self.model['anchor'])}, discount {self.model['discount']}</p>{table}"
            f"<p>units {self.n_units}; {self.accounting.describe()}<br>learner {self.learner}; "
            f"{self.folds} folds, {self.splits} split(s), seed {self.seed}</p>"
            f"<p>Coverage holds only under the assumptions:</p><ul>{assumptions}</ul></div>"
        )

    def _summary_html(self) -> str:
        """HTML of an estimator whose facts are its summary's (user moments, discrete states):
        the estimates table, then the plain-text summary, which names the estimator's own
        settings and assumptions (not the CCP estimator's folds and learners)."""
        table = self.to_frame().to_html(float_format=lambda v: f"{v:.4f}", border=0)
        return (f"<div><p><b>orthoccp</b>: {html.escape(self.method)}</p>{table}"
                f"<pre>{html.escape(self.summary())}</pre></div>")

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
        it. A reloaded result writes back the records it did not rebuild unchanged.
        """
        out = self._own_dict(level)
        if self.reloaded is not None:
            for key, value in self.reloaded.items():
                if key in _NOT_REBUILT or key not in out:
                    out[key] = value
        return out

    def _own_dict(self, level: float) -> dict[str, Any]:
        t = self.to_frame(level)
        return {
            "params": param_records(t),
            "level": level,
            "debiased": self.debiased,
            "moments": self.moments,
            "correction_weights": self.correction_weights,
            "moments_fallback": dict(self.fallback),
            "solution": {"routes": list(self.solve_routes), "notes": list(self.solve_notes),
                         "summary": self.solution},
            "interval_check": (None if self.interval_check is None
                               else self.interval_check.to_dict()),
            "diagnostics": None if self.diagnostics is None else self.diagnostics.to_dict(),
            "model": {k: (v if k != "anchor" else str(v)) for k, v in self.model.items()},
            "n_units": self.n_units,
            "n_rows": self.accounting.n_rows,
            "n_moment_rows": self.accounting.n_moment_rows,
            "rows_excluded": dict(self.accounting.excluded),
            "rows_dropped": dict(self.accounting.dropped),
            "learner": self.learner,
            "regressor": self.regressor,
            "nuisance_source": self.nuisance_source,
            "plugin_params": (None if self.plugin_params is None else
                              {str(k): json_number(v) for k, v in self.plugin_params.items()}),
            "folds": self.folds,
            "splits": self.splits,
            "scheme": self.scheme,
            "seed": self.seed,
            "clip": self.clip,
            "cov_type": self.cov_type,
            "small_sample": self.small_sample,
            "timings": {k: json_number(v) for k, v in self.timings.items()},
            "n_learner_fits": self.n_learner_fits,
            "clipped": {str(k): int(v) for k, v in self.clipped.items()},
            "variance_shares": {
                str(p): {c: json_number(v) for c, v in row.items()} for p, row in self.decomposition.iterrows()
            },
            "cov": [[json_number(v) for v in row] for row in self.cov.to_numpy()],
            "hansen_j": {"applicable": False, "reason": self.hansen_j.reason},
            "assumptions": list(ASSUMPTIONS),
            "version": self.version,
            "format": RESULTS_FORMAT,
            "result_type": type(self).__name__,
            "method": self.method,
            "iterations": self.iterations,
            "model_ccp_steps": self.model_ccp_steps,
            "n_corrected": self.accounting.n_corrected,
            "n_terminal": self.accounting.n_terminal,
            "split_params": (None if self.split_params is None else
                             [[json_number(v) for v in row] for row in self.split_params.to_numpy()]),
            "influence": {
                "units": [plain_label(u) for u in self.influence_units],
                "values": [[json_number(v) for v in row] for row in np.asarray(self.influence)],
            },
        }

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
            The numbers of the original (estimates, covariance, influence terms, settings,
            row accounting), so :func:`~orthoccp.difference_test`, :meth:`derive` and the
            summary work on it. Objects that are not rebuilt (diagnostics tables, interval
            checks, Hansen's J, the per-row moment pieces) are kept as the JSON records under
            their keys, and :meth:`to_dict` writes them back unchanged.
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
                f"not an orthoccp results record (format {found!r}; expected "
                f"{RESULTS_FORMAT!r}); write it with Results.to_json or 'orthoccp estimate "
                f"--json' from orthoccp 0.1 or later."
            )

        def num(v: Any) -> float:
            return float("nan") if v is None else float(v)

        names = [p["name"] for p in doc["params"]]
        index = pd.Index(names, name="parameter")
        cov = np.array([[num(v) for v in row] for row in doc["cov"]], dtype=np.float64)
        infl = doc["influence"]
        shares = doc.get("variance_shares") or {}
        decomposition = pd.DataFrame(
            {c: [num(shares[p][c]) for p in names] for c in (shares[names[0]] if names and names[0] in shares else {})},
            index=pd.Index(names),
        )
        split = doc.get("split_params")
        plugin = doc.get("plugin_params")
        accounting = RowAccounting(
            n_rows=int(doc["n_rows"]), n_moment_rows=int(doc["n_moment_rows"]),
            n_corrected=int(doc["n_corrected"]), n_terminal=int(doc["n_terminal"]),
            excluded={str(k): int(v) for k, v in doc.get("rows_excluded", {}).items()},
            dropped={str(k): int(v) for k, v in doc.get("rows_dropped", {}).items()},
        )
        solution = doc.get("solution") or {}
        return Results(
            params=pd.Series([num(p["estimate"]) for p in doc["params"]], index=index, name="estimate"),
            std_errors=pd.Series([num(p["std_error"]) for p in doc["params"]], index=index,
                                 name="std_error"),
            cov=pd.DataFrame(cov, index=index, columns=index),
            debiased=bool(doc["debiased"]),
            model=dict(doc["model"]),
            learner=str(doc["learner"]),
            regressor=str(doc["regressor"]),
            folds=int(doc["folds"]),
            splits=int(doc["splits"]),
            scheme=str(doc["scheme"]),
            seed=int(doc["seed"]),
            clip=float(doc["clip"]),
            cov_type=str(doc["cov_type"]),
            small_sample=bool(doc["small_sample"]),
            n_units=int(doc["n_units"]),
            accounting=accounting,
            clipped={str(k): int(v) for k, v in doc.get("clipped", {}).items()},
            decomposition=decomposition,
            influence=np.array([[num(v) for v in row] for row in infl["values"]],
                               dtype=np.float64).reshape(len(infl["units"]), len(names)),
            influence_units=np.array(infl["units"], dtype=object),
            timings={str(k): num(v) for k, v in doc.get("timings", {}).items()},
            n_learner_fits=int(doc.get("n_learner_fits", 0)),
            iterations=int(doc.get("iterations", 0)),
            split_params=(None if split is None else
                          pd.DataFrame([[num(v) for v in row] for row in split], columns=index)),
            plugin_params=(None if plugin is None else
                           pd.Series([num(plugin[n]) for n in names], index=index, name="plug-in")),
            nuisance_source=str(doc.get("nuisance_source", "")),
            model_ccp_steps=int(doc.get("model_ccp_steps", 0)),
            moments=str(doc.get("moments", "standard")),
            correction_weights=str(doc.get("correction_weights", "solution")),
            fallback={str(k): str(v) for k, v in doc.get("moments_fallback", {}).items()},
            solve_routes=tuple(solution.get("routes", ())),
            solve_notes=tuple(solution.get("notes", ())),
            version=str(doc.get("version", "")),
            reloaded=dict(doc),
        )
