"""Sensitivity to the discount factor: the same estimate over a grid of β.

The discount factor β is assumed known (METHOD §1), and it is the assumption users are asked
about first. :func:`discount_sensitivity` re-estimates the model at every β of a grid and
reports each parameter's estimate and interval against β.

The first stage does not depend on β: the cross-fitted CCPs :math:`\\hat P(x)` and the
continuation regressions :math:`\\hat\\mu_j(x) = E[(z_R(x_{t+1}), \\ln \\hat P_R(x_{t+1}))
\\mid x_t = x, a_t = j]` are fitted once and reused. What β enters is redone at every grid
point: the regressors and offsets of the moment (for a renewal model
:math:`X_j = z_j - z_R + \\beta(\\hat\\mu^z_j - \\hat\\mu^z_R)`,
:math:`o_j = -\\beta(\\hat\\mu^\\ell_j - \\hat\\mu^\\ell_R)`; :mod:`orthoccp.moments`), the
corrections, the renewal-robust projections (built at the β-specific plug-in estimate) and
the model-implied CCP steps.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ._errors import InputError
from .data import Panel
from .estimate import _FIRST_STAGE_STORE, estimate
from .model import Model
from .results import Results

__all__ = ["DiscountSensitivity", "discount_sensitivity"]


@dataclass(frozen=True, eq=False)
class DiscountSensitivity:
    """Estimates of one model at several discount factors.

    Attributes
    ----------
    results : dict
        Discount factor -> :class:`~orthoccp.Results`, in increasing β.
    assumed : float
        The model's own discount factor (the one the main estimate assumes).
    level : float
        Confidence level of the intervals in :meth:`to_frame` and :meth:`plot`.
    first_stage_fits : int
        Learner fits of the cross-fitted first stage, done once for the whole grid.
    other_fits : int
        Learner fits redone at each β (renewal-robust projections, model-implied steps).
    """

    results: dict[float, Results]
    assumed: float
    level: float = 0.95
    first_stage_fits: int = 0
    other_fits: int = 0

    @property
    def discounts(self) -> list[float]:
        """The grid, in increasing order."""
        return list(self.results)

    def to_frame(self) -> pd.DataFrame:
        """Tidy table: one row per discount factor and parameter.

        Columns ``discount``, ``parameter``, ``estimate``, ``std_error``, ``lower``,
        ``upper`` (the interval at ``level``) and ``plugin`` (the plug-in estimate at the
        same β from the same first stage).
        """
        rows = []
        for beta, res in self.results.items():
            ci = res.conf_int(self.level)
            for name in res.params.index:
                plugin = (float(res.plugin_params[name]) if res.plugin_params is not None
                          else float("nan"))
                rows.append({
                    "discount": beta, "parameter": str(name),
                    "estimate": float(res.params[name]),
                    "std_error": float(res.std_errors[name]),
                    "lower": float(ci.loc[name, "lower"]), "upper": float(ci.loc[name, "upper"]),
                    "plugin": plugin,
                })
        return pd.DataFrame(rows)

    def summary(self) -> str:
        """Text table of the estimates against β, one block per parameter."""
        t = self.to_frame()
        pct = f"{self.level * 100:g}%"
        head = (f"{'discount':>9}{'estimate':>11}{'s.e.':>9}{pct + ' lower':>11}"
                f"{pct + ' upper':>11}{'plug-in':>10}")
        lines = [f"orthoccp sensitivity to the discount factor (assumed: {self.assumed:g})"]
        for name, block in t.groupby("parameter", sort=False):
            lines += ["", f"{name}", head]
            for r in block.itertuples():
                mark = " *" if np.isclose(r.discount, self.assumed) else ""
                lines.append(f"{r.discount:>9.4g}{r.estimate:>11.4f}{r.std_error:>9.4f}"
                             f"{r.lower:>11.4f}{r.upper:>11.4f}{r.plugin:>10.4f}{mark}")
        lines += ["", "* the model's discount factor. The first stage (CCPs and continuation",
                  f"regressions, {self.first_stage_fits} learner fits) was fitted once and "
                  "reused at every discount factor."]
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.summary()

    def plot(self, *, path: str | Path | None = None) -> Any:
        """Each parameter's estimate and interval against β (:func:`orthoccp.figures.discount_plot`)."""
        from .figures import discount_plot

        return discount_plot(self, path=path)


def _check_discounts(discounts: Any) -> list[float]:
    if isinstance(discounts, (str, bytes)) or not isinstance(discounts, (Sequence, np.ndarray)):
        raise InputError(
            f"discounts must be a list of discount factors such as [0.9, 0.95, 0.99], got "
            f"{discounts!r}."
        )
    values = []
    for b in discounts:
        if isinstance(b, (bool, np.bool_)) or not isinstance(b, (int, float, np.integer,
                                                                 np.floating)):
            raise InputError(f"discounts must hold numbers in [0, 1), got {b!r}.")
        if not 0.0 <= float(b) < 1.0:
            raise InputError(
                f"discounts must hold numbers in [0, 1), got {b!r}; the infinite-horizon "
                f"model needs beta < 1."
            )
        values.append(float(b))
    if len(values) < 2:
        raise InputError(
            f"discounts needs at least two discount factors to show a sensitivity, got "
            f"{values!r}; e.g. discounts=[0.9, 0.95, 0.99]."
        )
    if len(set(values)) != len(values):
        raise InputError(f"discounts holds a value twice ({values!r}); give each β once.")
    return sorted(values)


def discount_sensitivity(
    panel: Panel,
    model: Model,
    *,
    discounts: Sequence[float],
    level: float = 0.95,
    **options: Any,
) -> DiscountSensitivity:
    r"""Re-estimate the model at each discount factor of a grid.

    Parameters
    ----------
    panel : Panel
        The data.
    model : Model
        The model; its ``discount`` is the assumed one (marked in the table and figure).
    discounts : sequence of float
        At least two distinct discount factors in [0, 1), e.g. ``[0.9, 0.925, 0.95, 0.975]``.
    level : float, default=0.95
        Confidence level of the intervals.
    **options
        Passed to :func:`~orthoccp.estimate` (``learner``, ``folds``, ``seed``, ``moments``,
        ``model_ccp_steps``, ...), the same at every β.

    Returns
    -------
    DiscountSensitivity

    Notes
    -----
    Each grid point equals ``estimate(panel, dataclasses.replace(model, discount=b),
    **options)`` (tested to 1e-8): the cross-fitted first stage
    :math:`(\hat P, \hat\mu)`, which does not involve β, is fitted once and reused; the
    β-dependent steps (the regressors :math:`X_j(\beta)` and offsets :math:`o_j(\beta)`, the
    corrections, the renewal-robust projections and the model-implied steps) draw from their
    own random streams of ``seed``, so they draw the seeds a fresh run would.
    A wrong β biases every parameter; the grid shows how far the conclusions move over a
    plausible range. β is not identified from choice data without exclusion restrictions
    (Magnac & Thesmar 2002), hence a sensitivity rather than an estimate.

    References
    ----------
    Magnac & Thesmar (2002) Econometrica 70; Arcidiacono & Miller (2011) Econometrica 79.
    """
    if not isinstance(model, Model):
        raise InputError(f"model must be an orthoccp.Model, got {type(model).__name__}.")
    if "discount" in options:
        raise InputError("discount is set by discounts=[...]; drop the discount option.")
    if not isinstance(level, float) or not 0.0 < level < 1.0:
        raise InputError(f"level must be a number in (0, 1), got {level!r}.")
    grid = _check_discounts(discounts)
    store: dict[Any, Any] = {}
    token = _FIRST_STAGE_STORE.set(store)
    results: dict[float, Results] = {}
    fits = []
    try:
        for beta in grid:
            res = estimate(panel, dataclasses.replace(model, discount=beta), **options)
            results[beta] = res
            fits.append(res.n_learner_fits)
    finally:
        _FIRST_STAGE_STORE.reset(token)
    first = sum(nuis.n_fits for nuis in store.values())
    return DiscountSensitivity(
        results=results, assumed=float(model.discount), level=level, first_stage_fits=first,
        other_fits=int(sum(fits)) - first,
    )
