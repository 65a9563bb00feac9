"""Robustness to the first stage: one model, several first stages, side by side.

Every first stage gives a debiased estimate with per-unit influence terms
:math:`\\hat\\psi^{(s)}_i = -G_s^{-1} s^{(s)}_i`. For two first stages a and b,

.. math::

    \\widehat{\\mathrm{Var}}(\\hat\\theta_a - \\hat\\theta_b)
        = c \\sum_i (\\hat\\psi^{(a)}_i - \\hat\\psi^{(b)}_i)(\\hat\\psi^{(a)}_i - \\hat\\psi^{(b)}_i)',

computed directly from both estimators' influence terms on the same units, so no efficiency
assumption is needed (unlike a Hausman test; METHOD §6). The test of equality per parameter is
:math:`z = (\\hat\\theta_a - \\hat\\theta_b)/\\mathrm{se}`; the joint test is the Wald statistic
with a :math:`\\chi^2_p` reference.
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from ._errors import EstimationError, InputError, OrthoCCPWarning
from ._progress import progress_bar
from .covariance import clustered_outer
from .data import Panel
from .estimate import estimate
from .model import Model
from .results import Results, cross_fit_details

__all__ = ["Comparison", "compare", "difference_test"]


def difference_test(a: Results, b: Results) -> pd.DataFrame:
    """Per-parameter test of equality of two estimates of the same model on the same data.

    Parameters
    ----------
    a, b : Results
        Two results on the same panel and model (any first stages, any moments).

    Returns
    -------
    pandas.DataFrame
        Columns ``difference``, ``std_error``, ``z``, ``p_value``; attribute
        ``attrs["wald"]`` holds the joint Wald statistic, its degrees of freedom and p-value.
    """
    if list(a.params.index) != list(b.params.index):
        raise InputError("the two results estimate different parameters; compare like with like.")
    ua = pd.Index(a.influence_units)
    ub = pd.Index(b.influence_units)
    if not ua.equals(ub):
        common = ua.intersection(ub)
        if len(common) < 2:
            raise InputError(
                "the two results share fewer than two units; the difference test needs both "
                "estimators' influence terms on the same units."
            )
        ia, ib = ua.get_indexer(common), ub.get_indexer(common)
    else:
        ia = ib = np.arange(len(ua))
    V, _ = clustered_outer(a.influence[ia] - b.influence[ib], small_sample=a.small_sample)
    diff = (a.params - b.params).to_numpy()
    se = np.sqrt(np.diag(V))
    with np.errstate(divide="ignore", invalid="ignore"):
        z = np.where(se > 0, diff / se, np.nan)
    table = pd.DataFrame(
        {"difference": diff, "std_error": se, "z": z, "p_value": 2 * stats.norm.sf(np.abs(z))},
        index=a.params.index,
    )
    wald = float(diff @ np.linalg.pinv(V) @ diff)
    df = int(np.linalg.matrix_rank(V))
    table.attrs["wald"] = {"statistic": wald, "df": df, "p_value": float(stats.chi2.sf(wald, df))}
    return table


@dataclass(frozen=True, eq=False)
class Comparison:
    """The same model under several first stages.

    Attributes
    ----------
    results : dict
        First-stage label -> :class:`~orthoccp.Results` (debiased).
    baseline : str
        Label of the parametric reference the others are tested against.
    tests : dict
        Label -> :func:`difference_test` table against the baseline.
    failed : dict
        Label -> why that first stage gave no estimate (its error message). A failed first
        stage is shown as failed in every view; the others go through.
    """

    results: dict[str, Results]
    baseline: str
    tests: dict[str, pd.DataFrame] = field(default_factory=dict)
    failed: dict[str, str] = field(default_factory=dict)

    @property
    def parameters(self) -> list[str]:
        """Parameter names (from any result that has them)."""
        for res in self.results.values():
            return list(res.params.index)
        return []

    def to_frame(self) -> pd.DataFrame:
        """Tidy table: one row per first stage and parameter."""
        rows = []
        for label, res in self.results.items():
            test = self.tests.get(label)
            for name in res.params.index:
                row: dict[str, Any] = {
                    "first_stage": label,
                    "parameter": name,
                    "estimate": float(res.params[name]),
                    "std_error": float(res.std_errors[name]),
                    "solution": ",".join(sorted(set(res.details.solve_routes))) or "-",
                }
                if test is not None:
                    row.update(
                        diff_vs_baseline=float(test.loc[name, "difference"]),
                        diff_std_error=float(test.loc[name, "std_error"]),
                        diff_p_value=float(test.loc[name, "p_value"]),
                    )
                rows.append(row)
        for label, why in self.failed.items():
            for name in self.parameters or ["-"]:
                rows.append({"first_stage": label, "parameter": name, "estimate": np.nan,
                             "std_error": np.nan, "solution": "failed: " + why})
        return pd.DataFrame(rows).set_index(["first_stage", "parameter"])

    def summary(self) -> str:
        """Text table with the equality tests against the baseline."""
        t = self.to_frame()
        lines = [
            f"orthoccp comparison of first stages (baseline: {self.baseline}); all debiased",
            f"{'first stage':<16}{'parameter':<18}{'estimate':>10}{'s.e.':>9}{'diff':>10}{'s.e.':>9}{'p':>8}",
        ]
        for (fs, name), r in t.iterrows():
            if fs in self.failed:
                continue
            test = self.tests.get(fs)
            diff = "" if test is None else f"{r['diff_vs_baseline']:>10.4f}{r['diff_std_error']:>9.4f}{r['diff_p_value']:>8.3f}"
            lines.append(f"{fs:<16}{name:<18}{r['estimate']:>10.4f}{r['std_error']:>9.4f}{diff}")
        for label, res in self.results.items():
            details = cross_fit_details(res, needed_by="Comparison.summary")
            if any(route != "newton" for route in details.solve_routes):
                lines.append(f"{label}: solution {details.solution}")
        for label, why in self.failed.items():
            lines.append(f"{label}: FAILED, no estimate ({why})")
        if self.baseline in self.failed:
            lines.append(f"no difference tests: the baseline {self.baseline} failed")
        for label, test in self.tests.items():
            w = test.attrs["wald"]
            lines.append(
                f"joint test {label} = {self.baseline}: Wald {w['statistic']:.2f} on {w['df']} df, "
                f"p = {w['p_value']:.3f}"
            )
        lines.append(
            "The difference tests use both estimators' per-unit influence terms (no efficiency "
            "assumption); they are valid under the model's assumptions."
        )
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.summary()

    def to_latex(self) -> str:
        """LaTeX tabular of the comparison."""
        t = self.to_frame().reset_index()
        body = [
            f"{r.first_stage} & {str(r.parameter).replace('_', chr(92) + '_')} & "
            + ("\\multicolumn{2}{c}{failed}" if r.first_stage in self.failed
               else f"{r.estimate:.4f} & ({r.std_error:.4f})") + " \\\\"
            for r in t.itertuples()
        ]
        return "\n".join(
            ["\\begin{tabular}{llrr}", "\\toprule", "First stage & Parameter & Estimate & Std. error \\\\",
             "\\midrule", *body, "\\bottomrule", "\\end{tabular}"]
        )

    def _repr_html_(self) -> str:
        return self.to_frame().to_html(float_format=lambda v: f"{v:.4f}", border=0)


def compare(
    panel: Panel,
    model: Model,
    *,
    first_stages: Mapping[str, Any] | None = None,
    baseline: str | None = None,
    seed: int = 0,
    progress: bool | None = None,
    **options: Any,
) -> Comparison:
    """Estimate one model with several first stages and test each against a baseline.

    Parameters
    ----------
    panel, model
        As for :func:`~orthoccp.estimate`.
    first_stages : mapping, optional
        Label -> learner (a registry name, a classifier, or a ``(classifier, regressor)``
        pair). Default: ``{"logit": "logit", "lightgbm": "lightgbm"}``.
    baseline : str, optional
        Label of the reference; default the first one (put the parametric first stage first).
    seed : int, default=0
        The same seed, hence the same folds, for every first stage.
    progress : bool, optional
        A progress bar over the first stages on stderr. By default the session's setting
        (:func:`orthoccp.set_progress`), else shown exactly when stderr is a terminal or the
        call runs in a notebook.
    **options
        Passed to :func:`~orthoccp.estimate` (``folds``, ``moments``, ...); ``debias`` is
        always True.
    """
    stages = dict(first_stages) if first_stages else {"logit": "logit", "lightgbm": "lightgbm"}
    if not stages:
        raise InputError("first_stages is empty; name at least one first stage.")
    base = baseline if baseline is not None else next(iter(stages))
    if base not in stages:
        raise InputError(
            f"baseline {base!r} is not among the first stages ({', '.join(stages)})."
        )
    if "debias" in options and not options["debias"]:
        raise InputError("compare runs debiased estimates only; drop debias=False.")
    options.pop("debias", None)
    results: dict[str, Results] = {}
    failed: dict[str, str] = {}
    first_error: Exception | None = None
    bar = progress_bar(len(stages), desc="first stages", unit="fit", progress=progress)
    try:
        for label, learner in stages.items():
            bar.set_postfix_str(label, refresh=True)
            regressor = None
            if isinstance(learner, tuple):
                learner, regressor = learner
            try:
                results[label] = estimate(
                    panel, model, learner=learner, regressor=regressor, seed=seed, **options
                )
            except (EstimationError, InputError) as exc:
                failed[label] = str(exc)
                first_error = first_error or exc
            bar.update()
    finally:
        bar.close()
    if not results:
        assert first_error is not None
        raise first_error  # every first stage failed: the input, not one learner, is at fault
    for label, why in failed.items():
        warnings.warn(f"first stage {label!r} failed and is left out: {why}", OrthoCCPWarning,
                      stacklevel=2)
    tests = {
        label: difference_test(res, results[base])
        for label, res in results.items() if label != base and base in results
    }
    return Comparison(results=results, baseline=base, tests=tests, failed=failed)
