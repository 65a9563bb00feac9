"""Fold stability: how much the estimate moves when one fold's nuisances are refit.

Cross-fitted estimates depend on the learners' randomness (bagging, feature subsampling,
initialisation). Holding the fold split fixed, the first stage is fitted twice, with the
learner seeds of ``seed`` and of an independent stream. For each fold k, the nuisance values
at fold k's rows are replaced by the refit's and the second stage is solved again:

.. math::

    \\Delta_k = \\hat\\theta\\big(\\hat\\eta^{(-k)}_{\\text{refit}},\\ \\hat\\eta^{(k' \\ne k)}\\big)
        - \\hat\\theta(\\hat\\eta), \\qquad k = 1, \\dots, K.

Changes that are small relative to the standard error mean the interval does not hinge on one
fold's learner randomness. Large ones call for repeated cross-fitting (``splits=S``, aggregated
by the median as in Chernozhukov et al. 2018, Econometrics Journal 21, §3.4) or a more stable
learner. A rule of thumb (common practice, not a test): changes above 0.2 standard errors
deserve repeated cross-fitting.
"""

from __future__ import annotations

import contextlib
import dataclasses
import warnings
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from ._errors import InputError
from ._progress import progress_bar
from ._random import stream
from .data import Panel
from ._options import check_options
from .estimate import _check_scheme, _choose_moments, estimate
from .folds import unit_folds
from .instruments import persistent_feature_columns
from .learners import resolve_learners
from .model import Model
from .nuisance import Nuisances, crossfit_nuisances
from .results import Results

__all__ = ["FoldStability", "fold_stability"]

#: Changes (in standard errors) above which the reading suggests repeated cross-fitting
#: (common practice; a rule of thumb).
NOTABLE_CHANGE_SE = 0.2


@dataclass(frozen=True, eq=False)
class FoldStability:
    """Estimates with one fold's nuisances refit under another learner seed.

    Attributes
    ----------
    reference : Results
        The estimate with every fold's nuisances from ``seed``.
    table : pandas.DataFrame
        One row per (refit fold, parameter): ``estimate``, ``change`` (from the reference)
        and ``change_se`` (the change in units of the reference's standard error).
    """

    reference: Results
    table: pd.DataFrame

    def max_change_se(self) -> pd.Series:
        """Per parameter, the largest absolute change in standard errors over the folds."""
        return self.table["change_se"].abs().groupby(level="parameter", sort=False).max()

    def reading(self) -> str:
        """One plain-language sentence on the stability of the estimate."""
        worst = self.max_change_se()
        name = str(worst.idxmax())
        value = float(worst.max())
        fold = int(self.table.xs(name, level="parameter")["change_se"].abs().idxmax())
        if value <= NOTABLE_CHANGE_SE:
            return (
                f"fold stability: refitting one fold's first stage with another seed moves no "
                f"estimate by more than {value:.2f} standard errors (largest: {name!r}, fold "
                f"{fold}); the estimate does not hinge on the learners' randomness."
            )
        return (
            f"fold stability: refitting fold {fold}'s first stage with another seed moves "
            f"{name!r} by {value:.2f} standard errors (more than {NOTABLE_CHANGE_SE}); the "
            f"estimate depends on the learners' randomness: use repeated cross-fitting "
            f"(splits=5 or more) or a more stable learner."
        )

    def to_frame(self) -> pd.DataFrame:
        """The tidy table (a copy)."""
        return self.table.copy()


def _splice(base: Nuisances, refit: Nuisances, rows: np.ndarray) -> Nuisances:
    ccp = base.ccp.copy()
    mu = base.mu.copy()
    ccp[rows] = refit.ccp[rows]
    mu[rows] = refit.mu[rows]
    clipped_rows = None
    if base.clipped_rows is not None and refit.clipped_rows is not None:
        clipped_rows = base.clipped_rows.copy()
        clipped_rows[rows] = refit.clipped_rows[rows]
    return dataclasses.replace(base, ccp=ccp, mu=mu, clipped_rows=clipped_rows, n_fits=0)


def fold_stability(
    panel: Panel,
    model: Model,
    *,
    learner: Any = "lightgbm",
    regressor: Any = None,
    folds: int = 5,
    seed: int = 0,
    scheme: str = "nested",
    clip: float = 1e-4,
    progress: bool | None = None,
    **options: Any,
) -> FoldStability:
    """Refit each fold's first stage with another seed and re-estimate (debiased).

    Parameters
    ----------
    panel, model
        As for :func:`~orthoccp.estimate`.
    learner, regressor, folds, seed, scheme, clip
        As for :func:`~orthoccp.estimate`; the fold split is the one ``seed`` draws there.
    progress : bool, optional
        A progress bar over the two first-stage fits and the re-estimates on stderr. By
        default the session's setting (:func:`orthoccp.set_progress`), else shown exactly
        when stderr is a terminal or the call runs in a notebook.
    **options
        Further :func:`~orthoccp.estimate` options (``moments``, ``cov``, ``small_sample``).

    Returns
    -------
    FoldStability

    Notes
    -----
    Costs two cross-fits of the first stage (the reference and the refit) and ``folds + 1``
    second-stage solves. The reference is :func:`~orthoccp.estimate` with the same options;
    with ``moments="standard"`` it reproduces that estimate exactly. The
    refit's learner seeds come from the ``refit`` stream of ``seed`` (:mod:`orthoccp._random`),
    independent of the first stage's, so the result is reproducible.
    """
    if options.get("debias", True) is not True:
        raise InputError("fold_stability checks the debiased estimate; drop debias=False.")
    options.pop("debias", None)
    for key in ("nuisances", "splits"):
        if key in options:
            raise InputError(f"fold_stability refits the first stage itself; drop {key}=.")
    check_options(folds=folds, clip=clip, seed=seed)
    _check_scheme(scheme, folds)
    bound = model.bind(panel)
    if not bound.has_next_stage:
        raise InputError(
            "fold stability needs a cross-fitted first stage; with discount 0 there is none."
        )
    moments = _choose_moments(bound, options.pop("moments", None), True)
    pair = resolve_learners(learner, regressor)
    fcols = persistent_feature_columns(bound) if moments == "renewal_robust" else None

    def fit(learners: str) -> tuple[np.ndarray, Nuisances]:
        # The fold split estimate draws, and the learner seeds of stream ``learners``.
        fold_of_row = unit_folds(panel.unit_codes, int(folds), stream(seed, "folds"),
                                 unit_keys=panel.unit_keys)
        return fold_of_row, crossfit_nuisances(
            bound, pair, fold_of_row, stream(seed, learners),
            scheme=scheme, clip=float(clip), anchor_features=fcols,  # type: ignore[arg-type]
        )

    bar = progress_bar(int(folds) + 3, desc="fold stability", unit="step", progress=progress)
    with contextlib.closing(bar):
        fold_of_row, base = fit("first_stage")
        bar.update()
        _, refit = fit("refit")
        bar.update()
        common = dict(
            learner=learner, regressor=regressor, folds=folds, seed=seed, scheme=scheme,
            clip=clip, moments=moments, **options,
        )
        # The reference raises the data's warnings once.
        reference = estimate(panel, model, nuisances=base, **common)
        bar.update()
        # The per-fold re-solves stay quiet.
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            rows = []
            for k in range(int(folds)):
                spliced = _splice(base, refit, np.flatnonzero(fold_of_row == k))
                res = estimate(panel, model, nuisances=spliced, **common)
                for name in reference.params.index:
                    change = float(res.params[name] - reference.params[name])
                    rows.append(
                        {
                            "fold": k,
                            "parameter": name,
                            "estimate": float(res.params[name]),
                            "change": change,
                            "change_se": change / float(reference.std_errors[name]),
                        }
                    )
                bar.update()
    table = pd.DataFrame(rows).set_index(["fold", "parameter"])
    return FoldStability(reference=reference, table=table)
