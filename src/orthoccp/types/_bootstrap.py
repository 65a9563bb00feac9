r"""A unit bootstrap of :func:`estimate_types`: the check on its sandwich standard errors.

Each draw resamples units with replacement (a drawn unit keeps its whole history and gets a
fresh label), re-estimates the transitions and the mixture, and starts the EM from the full
sample's posteriors of the drawn units (a warm start); the estimator's labelling rule (types
ordered by the first shifted constant) keeps type labels from swapping between draws.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from .._errors import EstimationError, InputError, OrthoCCPWarning
from .._random import stream
from ..data import Panel
from ._estimate import TypesResults, estimate_types

__all__ = ["TypesBootstrap", "bootstrap_types"]


@dataclass(frozen=True)
class TypesBootstrap:
    """Result of :func:`bootstrap_types`.

    Attributes
    ----------
    table : pandas.DataFrame
        Per parameter: ``estimate`` and ``std_error`` (the sandwich, from the full sample),
        ``bootstrap_sd`` (SD of the draws' estimates), ``ratio`` (bootstrap SD / sandwich
        s.e.), and ``lower``/``upper`` (the draws' 2.5 and 97.5 percentiles).
    estimates : pandas.DataFrame
        (draws that succeeded, p) every draw's estimates.
    draws : int
        Draws asked for.
    failed : int
        Draws whose estimate failed (left out of the table).
    """

    table: pd.DataFrame
    estimates: pd.DataFrame
    draws: int
    failed: int

    def __str__(self) -> str:
        head = (f"unit bootstrap, {self.draws - self.failed} of {self.draws} draws "
                f"({self.failed} failed)")
        return head + "\n" + self.table.round(4).to_string()


def _resample(panel: Panel, units: np.ndarray) -> pd.DataFrame:
    """The rows of the drawn units (codes, with repeats), each draw a fresh unit label."""
    frame = panel.frame
    order = np.argsort(panel.unit_codes, kind="stable")
    starts = np.searchsorted(panel.unit_codes[order], np.arange(panel.n_units))
    ends = np.append(starts[1:], order.size)
    rows = np.concatenate([order[starts[u]:ends[u]] for u in units])
    labels = np.repeat(np.arange(units.size), ends[units] - starts[units])
    out = frame.iloc[rows].copy()
    out[panel.unit] = labels
    return out


def bootstrap_types(result: TypesResults, panel: Panel, *, draws: int = 199, seed: int = 0,
                    **options: Any) -> TypesBootstrap:
    r"""Unit bootstrap of a finite-type estimate: the check on its sandwich standard errors.

    Parameters
    ----------
    result : TypesResults
        The full-sample estimate (:func:`estimate_types`).
    panel : Panel
        The panel it was estimated on.
    draws : int, default=199
        Bootstrap draws.
    seed : int, default=0
        Seeds the resampling (its own random stream).
    **options
        The options ``result`` was estimated with (``utility``, ``discount``,
        ``type_shifts``, ...), passed to :func:`estimate_types` for every draw; ``starts``
        defaults to 1 there (the warm start from the full sample's posteriors).

    Returns
    -------
    TypesBootstrap

    Notes
    -----
    The draws' spread estimates the sampling SD of :math:`\hat\theta` (Efron & Tibshirani
    1993, ch. 6) including the transitions' and the starts' variability; a ratio of bootstrap
    SD to sandwich s.e. far from 1 says the sandwich is off at this sample size. Draws
    resample whole units, as the clustered sandwich does (Cameron, Gelbach & Miller 2008).

    References
    ----------
    Efron, B. and Tibshirani, R. J. (1993). An Introduction to the Bootstrap. Chapman & Hall.
    Cameron, A. C., Gelbach, J. B. and Miller, D. L. (2008). Bootstrap-based improvements for
    inference with clustered errors. Review of Economics and Statistics 90(3), 414--427.
    """
    if not isinstance(result, TypesResults):
        raise InputError(f"result must be the TypesResults of estimate_types, got "
                         f"{type(result).__name__}.")
    if isinstance(draws, bool) or not isinstance(draws, (int, np.integer)) or draws < 2:
        raise InputError(f"draws must be an integer >= 2, got {draws!r}.")
    post = result.details.posteriors
    if post is None or len(post) != panel.n_units:
        raise InputError("panel must be the panel the result was estimated on (its units and "
                         "the result's posteriors do not match).")
    rng = stream(seed, "bootstrap")
    q = post.to_numpy()
    options = {"starts": 1, **options, "n_types": result.details.n_types}
    rows, failed = [], 0
    for _ in range(int(draws)):
        units = rng.integers(0, panel.n_units, size=panel.n_units)
        # the drawn units, relabelled 0..n-1 in draw order: the sorted unit order is the
        # draw order, so the warm start's rows line up
        frame = _resample(panel, units)
        p = Panel(frame, unit=panel.unit, period=panel.period, choice=panel.choice,
                  states=list(panel.states))
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", OrthoCCPWarning)
                r = estimate_types(p, initial_posteriors=q[units], **options)
        except EstimationError:
            failed += 1
            continue
        rows.append(r.params.to_numpy())
    if len(rows) < 2:
        raise EstimationError(f"{failed} of {draws} bootstrap draws failed; no spread to report.")
    est = pd.DataFrame(rows, columns=result.params.index)
    sd = est.std(ddof=1)
    table = pd.DataFrame({
        "estimate": result.params, "std_error": result.std_errors, "bootstrap_sd": sd,
        "ratio": sd / result.std_errors, "lower": est.quantile(0.025),
        "upper": est.quantile(0.975)})
    return TypesBootstrap(table=table, estimates=est, draws=int(draws), failed=failed)
