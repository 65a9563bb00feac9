"""Renewal-robust instruments: partialling out the post-renewal value (METHOD §4b).

In a renewal model the next state after the anchor depends only on the persistent states f
(those a renewal does not reset), so :math:`\\mu_R(x) = c(f)` and every index :math:`w_j`
contains the same :math:`-\\beta c(f)`. The moment
:math:`m = \\sum_{j \\ne R} A_j (1\\{a = j\\} - \\Lambda_j)` with

.. math::

    A_j = X_j - \\frac{E[\\sum_k X_k \\Lambda_k \\Lambda_R \\mid f]}{E[\\sum_k \\Lambda_k \\Lambda_R \\mid f]}

is orthogonal to any shift of all :math:`w_j` by a function of f, so it needs no correction
for :math:`\\mu_R` and none for :math:`\\ln P_R` at post-renewal states (where :math:`P_R` is
tiny and its inverse makes the standard correction heavy-tailed). The ratio is a weighted
conditional mean: the regression of :math:`X_{jk}` on f over (row, choice) pairs with weights
:math:`\\Lambda_j\\Lambda_R`, cross-fitted by unit at a preliminary :math:`\\theta`.

A parameter whose regressor is the same function of f under every non-anchor choice has
:math:`A = 0` and is not identified this way; it keeps the standard corrected moment of §4 in
the same just-identified system.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, replace

import numpy as np

from .backends import Backend, FeatureRows, resolve_backend
from .learners import LearnerPair
from .model import CONSTANT, BoundModel
from .moments import MomentSystem
from .nuisance import FoldFit, fit_predict, learner_dtype

__all__ = ["RobustPlan", "plan_robust", "renewal_robust_system", "persistent_feature_columns"]


@dataclass(frozen=True)
class RobustPlan:
    """Which parameters use residualised instruments, and why the others do not.

    Attributes
    ----------
    robust : numpy.ndarray
        (p,) booleans: True where the parameter's moment is residualised on f.
    reasons : dict
        Parameter name -> why it keeps the standard moment.
    """

    robust: np.ndarray
    reasons: dict[str, str]


def persistent_feature_columns(bound: BoundModel) -> np.ndarray:
    """Indices of the learner features that come from the persistent states."""
    persistent = set(bound.model.persistent)
    cols = [i for i, state in enumerate(bound.panel.feature_states) if state in persistent]
    return np.asarray(cols, dtype=np.int64)


def plan_robust(bound: BoundModel) -> RobustPlan:
    """Decide per parameter whether the residualised moment identifies it."""
    persistent = set(bound.model.persistent)
    R = bound.anchor_index
    params = bound.parameters
    robust = np.ones(len(params), dtype=bool)
    reasons: dict[str, str] = {}
    columns: dict[str, set[str]] = {name: set() for name in params}
    for spec in bound.model.utility.values():
        for name, col in spec.items():
            columns[name].add(col)
    flow = bound.Z - bound.Z[:, R : R + 1, :]
    others = [j for j in range(bound.Z.shape[1]) if j != R]

    def constant(col: str) -> bool:
        # The constant "1", or a data column that takes one value on every row (a column of
        # ones written into the data): its residualised instrument is zero just the same.
        if col == CONSTANT:
            return True
        values = np.asarray(bound.panel.column(col), dtype=np.float64)
        return values.size > 0 and float(np.ptp(values)) == 0.0

    for k, name in enumerate(params):
        f_only = all(constant(c) or c in persistent for c in columns[name])
        if k in set(bound.zR_params.tolist()):
            f_only = f_only and all(c in persistent for c in columns[name] if not constant(c))
        same = np.ptp(flow[:, others, k], axis=1).max() == 0.0 if len(others) > 1 else True
        if f_only and same:
            robust[k] = False
            what = ("a constant" if all(constant(c) for c in columns[name])
                    else "a function of the persistent states only")
            reasons[name] = (
                f"its regressor is {what} and the same for every non-anchor choice, so the "
                f"residualised instrument is zero; it uses the standard corrected moment"
            )
    return RobustPlan(robust=robust, reasons=reasons)


def renewal_robust_system(
    system: MomentSystem,
    theta_prelim: np.ndarray,
    f: np.ndarray | FeatureRows,
    folds: np.ndarray,
    plan: RobustPlan,
    pair: LearnerPair,
    rng: np.random.Generator,
    *,
    backend: Backend | None = None,
) -> MomentSystem:
    """The moment system with residualised instruments for the robust parameters.

    Parameters
    ----------
    system : MomentSystem
        The standard system (instruments X) at the moment rows.
    theta_prelim : numpy.ndarray
        Preliminary estimate (the plug-in solution) at which the weights are evaluated.
    f : numpy.ndarray or FeatureRows
        (n_moment_rows, q) persistent-state features of the moment rows, or the same named
        by index arrays into the panel's feature matrix
        (``FeatureRows(panel.features, rows, persistent_columns)``), which avoids a copy.
    folds : numpy.ndarray
        Fold of each moment row (the nuisances' folds).
    backend : Backend, optional
        Where the K fits per robust parameter run (:func:`orthoccp.backends.resolve_backend`);
        sequential by default. The numbers do not depend on it.
    """
    view = f if isinstance(f, FeatureRows) else FeatureRows(np.asarray(f))
    backend = backend if backend is not None else resolve_backend("sequential")
    R = system.anchor
    lam = system.probabilities(theta_prelim)
    n, J, p = system.X.shape
    others = np.array([j for j in range(J) if j != R])
    weight = lam[:, others] * lam[:, R : R + 1]  # (n, J-1)
    K = int(folds.max()) + 1
    A = system.X.copy()
    # (row, choice) pairs for the weighted regression, named by their moment row.
    row_stack = np.repeat(np.arange(n), others.size)
    w_stack = weight.reshape(-1)
    fold_stack = np.repeat(folds, others.size)
    dtype = learner_dtype(pair.regressor)
    jobs = [(k, fold, pair.new_regressor(rng)) for k in np.flatnonzero(plan.robust) for fold in range(K)]

    def tasks() -> Iterator[FoldFit]:
        for k, fold, est in jobs:
            train = np.flatnonzero(fold_stack != fold)
            y = system.X[:, others, k].reshape(-1)[train]
            pred = view.base_rows(np.flatnonzero(folds == fold))
            yield FoldFit(est, view.base_rows(row_stack[train]), pred, y, view.cols, dtype,
                          f"the renewal-robust projection, fold {fold}", fold,
                          weight=w_stack[train])

    c = np.empty(n)
    with backend.session(view.base, dtype=dtype) as session:
        for (k, fold, _), pred in zip(jobs, session.map(fit_predict, tasks())):
            c[folds == fold] = pred
            if fold == K - 1:
                A[:, others, k] = system.X[:, others, k] - c[:, None]
    A[:, R, :] = 0.0
    return replace(system, instruments=A, anchor_branch=~plan.robust)
