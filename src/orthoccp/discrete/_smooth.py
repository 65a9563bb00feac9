"""Smoothed starting CCPs for the discrete-state estimators: a logit sieve, or any classifier.

Cell frequencies are noisy where few rows fall, and their logarithms enter the Hotz--Miller
inversion, so one pseudo-likelihood step from them is biased in finite samples (Aguirregabiria
& Mira 2002, section 4). A smooth first stage borrows strength across neighbouring states. The
pseudo-likelihood score is orthogonal to the CCPs (the zero-Jacobian property, Aguirregabiria
& Mira 2002, Proposition 2), so the first stage's error enters the estimate only at second
order, and the covariance of :func:`~orthoccp.discrete.estimate_discrete` is unchanged.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
from numpy.polynomial import legendre

from .._errors import EstimationError
from ..learners import _check_methods, _seeded, checked_proba
from ._pseudo import cell_logit, newton_pseudo
from ._states import StateSpace

__all__ = ["classifier_ccp", "sieve_basis", "sieve_ccp"]


def _numeric(col: pd.Series) -> bool:
    return pd.api.types.is_numeric_dtype(col) and not pd.api.types.is_bool_dtype(col)


def sieve_basis(values: pd.DataFrame, degree: int) -> tuple[np.ndarray, list[str]]:
    """(S, q) additive sieve basis of the state columns, without the constant.

    Each numeric column x is rescaled to :math:`z = 2 (x - \\min x) / (\\max x - \\min x) - 1`
    over the S states and contributes the Legendre polynomials :math:`L_1(z), \\dots, L_d(z)`
    with :math:`d = \\min(\\text{degree}, \\text{distinct values} - 1)`; any other column
    contributes indicators of its values but the first. A column with one value contributes
    nothing.

    Parameters
    ----------
    values : pandas.DataFrame
        (S, n_columns) the state columns' values at each state
        (:attr:`StateSpace.values`).
    degree : int
        Highest polynomial degree per numeric column.

    Returns
    -------
    basis : numpy.ndarray
        (S, q) the basis.
    labels : list of str
        One label per basis column, e.g. ``"mileage^2"`` or ``"region=north"``.
    """
    blocks: list[np.ndarray] = []
    labels: list[str] = []
    for name in values.columns:
        col = values[name]
        if _numeric(col):
            x = col.to_numpy(dtype=np.float64)
            n_distinct = np.unique(x).size
            if n_distinct < 2:
                continue
            lo, hi = float(x.min()), float(x.max())
            z = 2.0 * (x - lo) / (hi - lo) - 1.0
            d = min(int(degree), n_distinct - 1)
            blocks.append(legendre.legvander(z, d)[:, 1:])
            labels += [f"{name}^{k}" for k in range(1, d + 1)]
        else:
            distinct = pd.unique(col)
            if distinct.size < 2:
                continue
            levels = sorted(distinct, key=str)[1:]
            blocks.append(np.column_stack([(col == v).to_numpy(dtype=np.float64)
                                           for v in levels]))
            labels += [f"{name}={v}" for v in levels]
    if not blocks:
        return np.zeros((len(values), 0)), labels
    return np.hstack(blocks), labels


def sieve_ccp(space: StateSpace, counts: np.ndarray, degree: int) -> np.ndarray:
    """CCPs from a multinomial logit of the choice on a sieve of the state.

    .. math::

        P_j(s) = \\frac{\\exp(\\alpha_j + b(s)'\\gamma_j)}
                      {\\sum_k \\exp(\\alpha_k + b(s)'\\gamma_k)},
        \\qquad \\alpha_1 = 0,\\ \\gamma_1 = 0,

    with :math:`b(s)` the basis of :func:`sieve_basis`. Its regressors are functions of the
    state, so the row-level likelihood equals the likelihood of the cell counts
    :math:`\\sum_{s,j} n_{sj} \\ln P_j(s)`, which is maximised by Newton's method
    (:func:`~orthoccp.discrete._pseudo.newton_pseudo`). A polynomial series logit is a
    standard smooth first stage for CCP estimators (Hotz & Miller 1993 use nonparametric
    first stages; Aguirregabiria & Mira 2010, Journal of Econometrics 156(1), 38--67, survey
    the choices; both from memory).

    Parameters
    ----------
    space : StateSpace
        The states and their column values.
    counts : numpy.ndarray
        (S, J) choice counts.
    degree : int
        Highest polynomial degree per numeric state column (:func:`sieve_basis`).

    Returns
    -------
    numpy.ndarray
        (S, J) fitted probabilities at every state (observed or not).

    Raises
    ------
    EstimationError
        When the sieve logit has no finite maximiser (a choice perfectly predicted by the
        states) or is not identified.
    """
    basis, labels = sieve_basis(space.values, degree)
    S, J = counts.shape
    X = np.hstack([np.ones((S, 1)), basis])
    q = X.shape[1]
    Zt = np.zeros((S, J, (J - 1) * q))
    for j in range(1, J):
        Zt[:, j, (j - 1) * q:j * q] = X
    names = tuple(f"{lab}[{j}]" for j in range(1, J) for lab in ("1", *labels))
    try:
        theta, _ = newton_pseudo(Zt, np.zeros((S, J)), counts, None, names=names)
    except EstimationError as exc:
        raise EstimationError(
            f"the sieve logit of the initial CCPs (degree {degree}) failed: {exc} Lower "
            f"sieve_degree, or use initial_ccp='frequency'."
        ) from exc
    return cell_logit(Zt, np.zeros((S, J)), theta)[0]


def _features(values: pd.DataFrame) -> np.ndarray:
    """(S, q) learner features of the states: numeric columns as they are, others one-hot."""
    parts: list[np.ndarray] = []
    for name in values.columns:
        col = values[name]
        if _numeric(col):
            parts.append(col.to_numpy(dtype=np.float64)[:, None])
        else:
            levels = sorted(pd.unique(col), key=str)
            parts.append(np.column_stack([(col == v).to_numpy(dtype=np.float64)
                                          for v in levels]))
    return np.hstack(parts)


def classifier_ccp(space: StateSpace, choice_codes: np.ndarray, n_choices: int, learner: Any,
                   *, seed: int) -> np.ndarray:
    """CCPs from a scikit-learn-style classifier fitted to the rows' states.

    The classifier (a fresh clone, its ``random_state`` drawn from ``seed``) is fitted on one
    feature row per panel row (the row's state values; non-numeric columns one-hot) and the
    choice codes, then predicts every state. It is fitted on all rows: the CCPs are a function
    of the state only and the pseudo-likelihood score is orthogonal to them (module notes).

    Parameters
    ----------
    space : StateSpace
        The states, their values and each row's state code.
    choice_codes : numpy.ndarray
        (n_rows,) each row's choice position 0..J-1.
    n_choices : int
        J.
    learner : classifier
        Any object with ``fit``, ``predict_proba`` and ``get_params``.
    seed : int
        Seeds the clone's ``random_state``.

    Returns
    -------
    numpy.ndarray
        (S, J) predicted probabilities at every state.
    """
    from sklearn.base import clone

    _check_methods(learner, "initial_ccp", ("fit", "predict_proba", "get_params"),
                   "pass 'frequency', 'sieve', an (S, J) array, or a scikit-learn-style "
                   "classifier")
    est = _seeded(clone(learner), np.random.default_rng(seed))
    X = _features(space.values)
    est.fit(X[space.codes], np.asarray(choice_codes))
    return checked_proba(est, X, n_choices, fold=0)
