r"""Counterfactuals: the model re-solved at changed payoffs, on the data's own states.

An estimate answers "what if" once the model is solved at the changed flow payoffs. The
states are high-dimensional, so the model is solved on the observed rows by fitted value
iteration (issue "Counterfactuals and welfare"): with :math:`t` a data row,

.. math::

    V_{k+1}(x_t) = \ln\sum_j \exp v_j(x_t) + \gamma_E, \qquad
    v_j(x_t) = u_j(x_t;\theta') + \beta\,\hat E_j[V_k(x_{s+1}) \mid x_t],

where :math:`v_R = u_R` for a terminal anchor and :math:`\hat E_j` averages :math:`V_k` at the
observed next rows of the rows :math:`s` that chose :math:`j` near :math:`x_t`. The transitions
depend on the state and the choice only (the model's assumption), so the data's own
transitions serve the counterfactual.

:math:`\hat E_j` is an *averager* (non-negative weights summing to one), so the iteration is a
contraction of modulus :math:`\beta` and converges (Gordon 1995, "Stable function
approximation in dynamic programming", ICML). It is fitted once and applied as a sparse matrix
at every step:

``"forest"`` (default)
    random-forest kernel weights: a forest fitted (on the other folds of units) to predict the
    next row's utility columns and choice from the learner features; a row averages over the
    training rows sharing its leaf in each tree, :math:`W(x, s) = B^{-1}\sum_b 1\{s \in
    L_b(x)\}/|L_b(x)|` (Lin & Jeon 2006's potential nearest neighbours), so the
    neighbourhoods follow the states that move the future rather than every covariate;
``"knn"``
    the ``neighbours`` nearest rows that chose :math:`j` (Euclidean distance on the
    standardised learner features), cross-fitted by unit: a row of fold k averages over rows
    of the other folds, so a row never reads its own next state. With many covariates the
    distance is dominated by the irrelevant ones (measured in docs/validation.md);
``"cells"``
    all rows that chose :math:`j` in the same state (identical features): the empirical
    transitions of a discrete state space (not cross-fitted). A row whose state has no such row
    falls back to its nearest neighbour's state, and the count is reported.

After a renewal (the anchor of a renewal model) the next state depends on the persistent
states only (METHOD §4b): the averager then uses the persistent features, or pools every
renewal row when none is declared. The baseline at :math:`\hat\theta` is computed by the same
route, so approximation error cancels in the differences.

Statistics, per unit :math:`i` with rows :math:`t \in i` and first row :math:`t_i`:

* ``share[j]``: the predicted share of choice :math:`j` over the sample's rows,
  :math:`\sum_t P_j(x_t)/n`;
* ``discounted count[j]``: the expected discounted number of choices :math:`j` from each
  unit's first state, :math:`N_j(x_{t_i})` with :math:`N_j = P_j + \beta \sum_{k} P_k
  \hat E_k[N_j]` (no continuation after a terminal anchor), averaged over units;
* ``value (utils)``: the expected discounted utility :math:`V(x_{t_i})` averaged over units,
  and ``value (money)``, the same divided by the utility of one unit of money when ``money``
  names it.

Inference. Each statistic is a smooth function :math:`\bar g(\theta)` of the estimate
averaged over units; its influence term for unit :math:`i` is
:math:`\psi_i = (a_i - n_i \bar g)/n + \nabla_\theta \bar g \cdot \mathrm{IF}_i` (the
averaging over units and the parameters' per-unit influence terms, METHOD §6), clustered by
unit with the estimate's small-sample factor; the gradient is by central differences. The
intervals include the parameters' estimation noise (first stage included, through the
debiased influence terms) and the sampling of units; they do **not** include the noise of the
averager :math:`\hat E` (the transitions), which is treated as known.

Identification. Under the model's parametric payoffs (which fix the normalisation, e.g. a
choice without a constant), a change of parameters or a constant shift of a payoff is
identified given that normalisation is the true one; counterfactuals can depend on it
(Kalouptsidi, Scott & Souza-Rodrigues 2021, Quantitative Economics 12). A shift of the payoff
of a choice whose utility has no free constant changes the normalisation itself, and a warning
says so.

References
----------
Gordon (1995) ICML; Lin & Jeon (2006) JASA 101; Rust (1987) Econometrica 55; Hotz & Miller (1993) Review of Economic
Studies 60; Kalouptsidi, Scott & Souza-Rodrigues (2021) Quantitative Economics 12.
"""

from __future__ import annotations

import time
import warnings
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from scipy import sparse, stats
from sklearn.neighbors import NearestNeighbors

from ._errors import EstimationError, InputError, OrthoCCPWarning
from ._labels import find_label, show_label, show_labels
from ._numeric import central_jacobian
from ._random import stream
from .data import Panel
from .dp import logsumexp
from .folds import unit_folds
from .functions import _compile
from .instruments import persistent_feature_columns
from .model import EULER_GAMMA, BoundModel, Model
from .results import Results, cross_fit_details

__all__ = ["Counterfactual", "DemandCurve", "TransitionAverager", "Weights", "counterfactual",
           "demand_curve", "fit_averager", "solve_on_rows"]

AVERAGERS = ("forest", "knn", "cells")


# --------------------------------------------------------------------------- averager
@dataclass(frozen=True, eq=False)
class Weights:
    r"""A row-stochastic averaging operator :math:`W = L\,R` in two sparse factors.

    ``R`` (g, n) averages a function of the rows over each group's next rows and ``L`` (n, g)
    gives each row its group, so cell means and pooled renewals cost n + (training rows)
    entries instead of one per pair of rows; a nearest-neighbour operator is one factor
    (``L`` None).
    """

    right: sparse.csr_matrix
    left: sparse.csr_matrix | None = None

    def __matmul__(self, f: np.ndarray) -> np.ndarray:
        out = self.right @ f
        return out if self.left is None else self.left @ out


@dataclass(frozen=True, eq=False)
class TransitionAverager:
    r""":math:`\hat E_j[f(x_{s+1}) \mid x_t]` for every row t and choice j, as fixed weights.

    Attributes
    ----------
    operators : tuple
        Per choice, the :class:`Weights` W with ``(W @ f)[t]`` the average of ``f`` over the
        next rows of the rows that chose j near row t; None for a terminal anchor (no
        continuation).
    kind : str
        ``"forest"``, ``"knn"`` or ``"cells"``.
    neighbours : int
        Neighbours per row (``"knn"``) or the forest's minimum leaf size.
    fallback_rows : dict
        Per choice label, rows whose state had no row of that choice (``"cells"``: they use
        their nearest neighbour's state).
    """

    operators: tuple[Weights | None, ...]
    kind: str
    neighbours: int
    fallback_rows: dict[str, int] = field(default_factory=dict)

    def expect(self, f: np.ndarray) -> np.ndarray:
        r"""(n, J) :math:`\hat E_j[f(x')\mid x_t]` (NaN for a choice without continuation)."""
        out = np.full((f.shape[0], len(self.operators)), np.nan)
        for j, W in enumerate(self.operators):
            if W is not None:
                out[:, j] = W @ f
        return out


def _standardised(X: np.ndarray) -> np.ndarray:
    sd = X.std(axis=0)
    return (X - X.mean(axis=0)) / np.where(sd > 0, sd, 1.0)


def _grouped(n: int, group_of_row: np.ndarray, members: list[np.ndarray], nxt: np.ndarray) -> Weights:
    r"""Rows average f over the next rows of their group's members (equal weights)."""
    g = len(members)
    left = sparse.csr_matrix((np.ones(n), (np.arange(n), group_of_row)), shape=(n, g))
    rows = np.concatenate([np.full(m.size, k) for k, m in enumerate(members)])
    cols = np.concatenate([nxt[m] for m in members])
    w = np.concatenate([np.full(m.size, 1.0 / m.size) for m in members])
    return Weights(sparse.csr_matrix((w, (rows, cols)), shape=(g, n)), left)


def _next_targets(bound: BoundModel) -> np.ndarray:
    r"""What the forest averager's leaves should separate: at each row, the next row's
    non-constant utility columns and choice indicators (standardised; NaN-free rows only
    matter, as only rows with a next row train)."""
    panel = bound.panel
    Z = bound.Z.reshape(panel.n_rows, -1)
    Z = Z[:, np.ptp(Z, axis=0) > 0]
    onehot = (panel.choice_codes[:, None] == np.arange(len(panel.choices))[None, :]).astype(float)
    Y = _standardised(np.hstack([Z, onehot]))
    out = np.zeros_like(Y)
    linked = panel.next_row >= 0
    out[linked] = Y[panel.next_row[linked]]
    return out


def _forest_weights(X: np.ndarray, train: np.ndarray, fold: np.ndarray, nxt: np.ndarray,
                    targets: np.ndarray | None, min_leaf: int, seed: int,
                    trees: int = 50) -> Weights:
    r"""Random-forest kernel weights, cross-fitted by fold: a row of fold k averages, over the
    trees of a forest fitted on the other folds, the next rows of the training rows that
    share its leaf, :math:`W(x, s) = B^{-1}\sum_b 1\{s \in L_b(x)\}/|L_b(x)|` (a
    non-negative kernel summing to one: an averager). The forest predicts the next row's
    utility columns and choice, so its leaves follow the states that move the future."""
    from sklearn.ensemble import RandomForestRegressor

    assert targets is not None
    n = X.shape[0]
    K = int(fold.max()) + 1
    left_r, left_c, right_r, right_c, right_w = [], [], [], [], []
    offset = 0
    for k in range(K):
        rows = np.flatnonzero(fold == k)
        tr = train[fold[train] != k]
        if tr.size == 0:
            raise InputError(f"no observed transition outside fold {k}; use fewer folds.")
        forest = RandomForestRegressor(n_estimators=trees, min_samples_leaf=min_leaf,
                                       max_features=0.5, random_state=seed + k, n_jobs=1)
        forest.fit(X[tr], targets[tr])
        leaf_tr = forest.apply(X[tr])      # (n_train, B)
        leaf_q = forest.apply(X[rows])     # (n_rows_k, B)
        for b in range(leaf_tr.shape[1]):
            ids, inv = np.unique(leaf_tr[:, b], return_inverse=True)
            size = np.bincount(inv)
            q = np.searchsorted(ids, leaf_q[:, b])  # every leaf of the tree holds training rows
            left_r.append(rows)
            left_c.append(offset + q)
            right_r.append(offset + inv)
            right_c.append(nxt[tr])
            right_w.append(1.0 / size[inv])
            offset += ids.size
    left = sparse.csr_matrix((np.full(sum(r.size for r in left_r), 1.0 / trees),
                              (np.concatenate(left_r), np.concatenate(left_c))), shape=(n, offset))
    right = sparse.csr_matrix((np.concatenate(right_w),
                               (np.concatenate(right_r), np.concatenate(right_c))), shape=(offset, n))
    return Weights(right, left)


def fit_averager(
    bound: BoundModel,
    *,
    averager: str = "forest",
    neighbours: int = 10,
    folds: int = 5,
    seed: int = 0,
) -> TransitionAverager:
    r"""Fit the transition averager of every choice on the panel's observed transitions.

    Parameters
    ----------
    bound : BoundModel
        The model bound to the panel (``Model.bind``).
    averager : {"forest", "knn", "cells"}, default="forest"
        Random-forest kernel or nearest neighbours (both cross-fitted by unit), or cell means
        of identical states (module docstring).
    neighbours : int, default=10
        Neighbours per row (``"knn"``) or the minimum leaf size (``"forest"``).
    folds : int, default=5
        Folds of units (drawn from ``seed``).
    seed : int, default=0
        Seeds the fold split and the forests.

    Returns
    -------
    TransitionAverager
    """
    if averager not in AVERAGERS:
        raise InputError(f"averager must be one of {', '.join(map(repr, AVERAGERS))}, got {averager!r}.")
    if isinstance(neighbours, bool) or not isinstance(neighbours, (int, np.integer)) or neighbours < 1:
        raise InputError(f"neighbours must be a positive integer, got {neighbours!r}.")
    panel = bound.panel
    n = panel.n_rows
    X = _standardised(panel.features)
    codes = panel.choice_codes
    nxt = panel.next_row
    linked = nxt >= 0
    R = bound.anchor_index
    renewal = bound.model.kind == "renewal"
    pcols = persistent_feature_columns(bound) if renewal else np.empty(0, dtype=np.int64)
    fold = (unit_folds(panel.unit_codes, int(folds), stream(seed, "folds"),
                       unit_keys=panel.unit_keys) if averager != "cells" else np.zeros(n, dtype=np.int64))
    targets = _next_targets(bound) if averager == "forest" else None
    K = int(fold.max()) + 1
    ops: list[Weights | None] = []
    fallback: dict[str, int] = {}
    for j, label in enumerate(panel.choices):
        if j == R and not renewal:
            ops.append(None)
            continue
        train = np.flatnonzero(linked & (codes == j))
        if train.size == 0:
            raise InputError(
                f"choice {show_label(label)} is never followed by an observed next period; the "
                f"counterfactual needs its transitions."
            )
        Xj = X[:, pcols] if j == R else X
        if averager == "forest" and Xj.shape[1] > 0:
            ops.append(_forest_weights(Xj, train, fold, nxt, targets, int(neighbours), seed))
            continue
        if averager == "knn" and Xj.shape[1] > 0:
            r_, c_, w_ = [], [], []
            for k in range(K):
                rows = np.flatnonzero(fold == k)
                tr = train[fold[train] != k]
                if tr.size == 0:
                    raise InputError(
                        f"choice {show_label(label)} has no observed transition outside fold "
                        f"{k}; use fewer folds or averager='cells'."
                    )
                m = min(int(neighbours), tr.size)
                idx = NearestNeighbors(n_neighbors=m).fit(Xj[tr]).kneighbors(
                    Xj[rows], return_distance=False)
                r_.append(np.repeat(rows, m))
                c_.append(nxt[tr][idx].reshape(-1))
                w_.append(np.full(rows.size * m, 1.0 / m))
            ops.append(Weights(sparse.csr_matrix(
                (np.concatenate(w_), (np.concatenate(r_), np.concatenate(c_))), shape=(n, n))))
            continue
        if averager in ("knn", "forest"):  # no feature to be near in: pool each fold's complement
            members = [train[fold[train] != k] for k in range(K)]
            if any(m.size == 0 for m in members):
                raise InputError(
                    f"choice {show_label(label)} has no observed transition outside some fold; "
                    f"use fewer folds or averager='cells'."
                )
            ops.append(_grouped(n, fold, members, nxt))
            continue
        # cells: identical (persistent) features form a state; the empirical transitions
        if Xj.shape[1]:
            cell = pd.MultiIndex.from_arrays([np.round(Xj[:, c], 12) for c in range(Xj.shape[1])]
                                             ).factorize()[0]
        else:
            cell = np.zeros(n, dtype=np.int64)
        n_cells = int(cell.max()) + 1
        counts = np.bincount(cell[train], minlength=n_cells)
        group_of_cell = np.full(n_cells, -1)
        have = np.flatnonzero(counts > 0)
        group_of_cell[have] = np.arange(have.size)
        order = np.argsort(cell[train], kind="stable")
        bounds = np.concatenate([[0], np.cumsum(counts)])
        tr_sorted = train[order]
        members = [tr_sorted[bounds[c]:bounds[c + 1]] for c in have]
        group = group_of_cell[cell]
        missing = np.flatnonzero(group < 0)
        if missing.size:
            fallback[str(label)] = int(missing.size)
            near = NearestNeighbors(n_neighbors=1).fit(Xj[train]).kneighbors(
                Xj[missing], return_distance=False)[:, 0]
            group[missing] = group_of_cell[cell[train[near]]]
        ops.append(_grouped(n, group, members, nxt))
    return TransitionAverager(tuple(ops), averager, int(neighbours), fallback)


# --------------------------------------------------------------------------- solver
@dataclass(frozen=True, eq=False)
class RowSolution:
    r"""Fitted value iteration on the data rows: values, choice values, CCPs, convergence."""

    value: np.ndarray
    choice_values: np.ndarray
    iterations: int
    residual: float

    @property
    def ccp(self) -> np.ndarray:
        v = self.choice_values
        return np.exp(v - logsumexp(v)[:, None])


def _iterate(step: Any, x: np.ndarray, discount: float, extrapolate: bool, tol: float,
             max_iter: int, what: str) -> tuple[np.ndarray, int, float]:
    r"""Successive approximation ``x <- step(x)`` of a contraction of modulus ``discount``.

    With ``extrapolate`` (every choice continues, so ``step(x + c) = step(x) + discount * c``
    for a constant c) each step adds MacQueen--Porteus's correction
    :math:`\frac{\beta}{1-\beta}\,\frac{\min d + \max d}{2}`, :math:`d = T x - x`, and stops
    when the bounds' half-width :math:`\frac{\beta}{1-\beta}\,\frac{\max d - \min d}{2}`
    is below ``tol`` (Porteus 1971; Bertsekas, Dynamic Programming and Optimal Control,
    vol. 2, §1.3); otherwise it stops when the sup-norm change is below ``tol``. Returns the
    point, the steps and the final bound.
    """
    ratio = discount / (1.0 - discount)
    for it in range(1, max_iter + 1):
        new = step(x)
        d = new - x
        lo, hi = float(d.min(axis=0).min()), float(d.max(axis=0).max())
        if extrapolate:
            lo_c, hi_c = d.min(axis=0), d.max(axis=0)  # per column (the counts' columns)
            x = new + ratio * (lo_c + hi_c) / 2
            bound = float(np.max(ratio * (hi_c - lo_c) / 2))
        else:
            x = new
            bound = max(abs(lo), abs(hi))
        if bound < tol:
            return x, it, bound
    raise EstimationError(f"{what} did not converge in {max_iter} steps (last bound {bound:.3g}).")


def solve_on_rows(
    utility: np.ndarray,
    averager: TransitionAverager,
    discount: float,
    *,
    start: np.ndarray | None = None,
    tol: float = 1e-10,
    max_iter: int = 100_000,
) -> RowSolution:
    r"""Fitted value iteration :math:`V \leftarrow \ln\sum_j e^{u_j + \beta W_j V} + \gamma_E`.

    Parameters
    ----------
    utility : numpy.ndarray
        (n, J) flow utilities at the data rows.
    averager : TransitionAverager
        The weights :math:`W_j` (None for a terminal anchor: :math:`v_R = u_R`).
    discount : float
        :math:`\beta`.
    start : numpy.ndarray, optional
        Starting values (zeros by default).
    tol : float, default=1e-10
        Stop when the solution is known to within ``tol`` in sup norm: MacQueen--Porteus
        bounds when every choice continues (a renewal model), else when the change of a step
        is below ``tol`` (then the distance to the fixed point is below
        :math:`\beta\,\mathrm{tol}/(1-\beta)`).
    max_iter : int, default=100000
        Raise :class:`~orthoccp.EstimationError` beyond this.

    Returns
    -------
    RowSolution
    """
    n, J = utility.shape
    ops = averager.operators
    v = utility.copy()

    def choice_values(V: np.ndarray) -> np.ndarray:
        for j, W in enumerate(ops):
            v[:, j] = utility[:, j] + (discount * (W @ V) if W is not None else 0.0)
        return v

    def step(V: np.ndarray) -> np.ndarray:
        return logsumexp(choice_values(V)) + EULER_GAMMA

    V0 = np.zeros(n) if start is None else np.array(start, dtype=np.float64)
    extrapolate = all(W is not None for W in ops)
    V, it, bound = _iterate(step, V0, discount, extrapolate, tol, max_iter,
                            "fitted value iteration")
    return RowSolution(V, choice_values(V).copy(), it, bound)


def _discounted_counts(P: np.ndarray, averager: TransitionAverager, discount: float,
                       tol: float = 1e-10, max_iter: int = 100_000) -> np.ndarray:
    r"""(n, J) :math:`N_j = P_j + \beta\sum_k P_k W_k N_j` by the same contraction."""
    ops = averager.operators

    def step(N: np.ndarray) -> np.ndarray:
        cont = np.zeros_like(N)
        for k, W in enumerate(ops):
            if W is not None:
                cont += P[:, [k]] * (W @ N)
        return P + discount * cont

    extrapolate = all(W is not None for W in ops)
    N, _, _ = _iterate(step, P.copy(), discount, extrapolate, tol, max_iter,
                       "the expected discounted counts")
    return N


# --------------------------------------------------------------------------- results
@dataclass(frozen=True, eq=False)
class Counterfactual:
    r"""A counterfactual and its baseline, solved on the data's states, with intervals.

    Attributes
    ----------
    table : pandas.DataFrame
        Tidy: one row per statistic and scenario (``baseline``, ``counterfactual``,
        ``difference``) with ``estimate``, ``std_error``, ``ci_lower``, ``ci_upper``.
    ccp : dict
        ``"baseline"`` and ``"counterfactual"``: DataFrames of choice probabilities per data
        row, indexed like the input rows.
    changes : dict
        The changes, as given.
    noise : str
        Which noise the intervals include.
    iterations : dict
        Value-iteration steps of the baseline and the counterfactual solve.
    averager : TransitionAverager
        The transition weights used.
    """

    table: pd.DataFrame
    ccp: dict[str, pd.DataFrame]
    changes: dict[str, Any]
    noise: str
    iterations: dict[str, int]
    averager: TransitionAverager
    level: float
    seconds: float
    learner: str = ""

    def describe_changes(self) -> str:
        """The changes in words: ``swap_cost set to -4; swap +1 util``."""
        parts = [f"{k} set to {v:g}" for k, v in self.changes.get("set", {}).items()]
        parts += [f"{k} {v:+g} util{'s' if abs(v) != 1 else ''}"
                  for k, v in self.changes.get("shift", {}).items()]
        if self.changes.get("money"):
            parts.append(f"money valued at {self.changes['money']} utils per unit")
        return "; ".join(parts)

    def summary(self) -> str:
        """Plain text: the changes, the table, the noise the intervals include."""
        pct = int(round(self.level * 100))
        lines = ["counterfactual: " + self.describe_changes()]
        head = f"{'statistic':<28}{'scenario':<16}{'estimate':>11}{'std.err':>11}{f'[{pct}% conf. int.]':>24}"
        lines += ["=" * len(head), head, "-" * len(head)]
        for (stat, scen), r in self.table.iterrows():
            lines.append(f"{stat:<28}{scen:<16}{r.estimate:>11.4f}{r.std_error:>11.4f}"
                         f"{r.ci_lower:>12.4f}{r.ci_upper:>12.4f}")
        lines.append("-" * len(head))
        lines.append(f"solved by fitted value iteration on the data rows ({self.averager.kind} "
                     f"averager; {self.iterations['baseline']} and "
                     f"{self.iterations['counterfactual']} steps)")
        if self.averager.fallback_rows:
            lines.append("rows whose state had no transition of a choice (nearest state used): "
                         + ", ".join(f"{k}: {v}" for k, v in self.averager.fallback_rows.items()))
        lines.append(f"intervals include {self.noise}")
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.summary()


def _check_changes(bound: BoundModel, set_: Mapping[str, float] | None,
                   shift: Mapping[Any, float] | None) -> tuple[dict[str, float], dict[int, float]]:
    params = list(bound.parameters)
    new: dict[str, float] = {}
    for name, value in (set_ or {}).items():
        if name not in params:
            raise InputError(f"set: {name!r} is not a parameter (parameters: {', '.join(params)}).")
        if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)) \
                or not np.isfinite(value):
            raise InputError(f"set: {name!r} must be a finite number, got {value!r}.")
        new[name] = float(value)
    shifts: dict[int, float] = {}
    for label, amount in (shift or {}).items():
        j = find_label(label, bound.panel.choices, role="choice")
        if j is None:
            raise InputError(
                f"shift: {show_label(label)} is not a choice (choices: "
                f"{show_labels(bound.panel.choices)})."
            )
        if isinstance(amount, bool) or not isinstance(amount, (int, float, np.integer, np.floating)) \
                or not np.isfinite(amount):
            raise InputError(f"shift: the amount for {show_label(label)} must be a finite number, got {amount!r}.")
        shifts[j] = float(amount)
    if not new and not shifts:
        raise InputError("no change given: pass set={parameter: value} and/or shift={choice: utils}.")
    return new, shifts


def _checked_inputs(results: Results, panel: Panel, model: Model, level: Any) -> BoundModel:
    """The model bound to the panel, after checking that ``results`` estimate it."""
    if not isinstance(results, Results):
        raise InputError(f"results must be an orthoccp Results, got {type(results).__name__}.")
    cross_fit_details(results, needed_by="counterfactual")
    if not isinstance(panel, Panel) or not isinstance(model, Model):
        raise InputError("panel and model must be the orthoccp.Panel and orthoccp.Model of the estimate.")
    if not (isinstance(level, float) and 0 < level < 1):
        raise InputError(f"level must be a number in (0, 1), got {level!r}.")
    bound = model.bind(panel)
    params = list(bound.parameters)
    if list(results.params.index) != params:
        raise InputError(
            f"the results estimate {', '.join(results.params.index)}, the model has "
            f"{', '.join(params)}: pass the model and panel the estimate was made on."
        )
    if bound.model.discount <= 0:
        raise InputError("the counterfactual needs a dynamic model (discount > 0).")
    return bound


def counterfactual(
    results: Results,
    panel: Panel,
    model: Model,
    *,
    set: Mapping[str, float] | None = None,  # noqa: A002 - the natural name of the option
    shift: Mapping[Any, float] | None = None,
    money: str | None = None,
    averager: str | TransitionAverager = "forest",
    neighbours: int = 10,
    folds: int = 5,
    seed: int = 0,
    level: float = 0.95,
) -> Counterfactual:
    r"""Solve the estimated model at changed payoffs and compare with the baseline.

    Parameters
    ----------
    results : Results
        An estimate of ``model`` on ``panel`` (its parameters, covariance and per-unit
        influence terms).
    panel, model : Panel, Model
        The data and model the estimate was made on.
    set : mapping, optional
        Parameter -> its counterfactual value (e.g. a cost cut by 20 %).
    shift : mapping, optional
        Choice -> utils added to its flow payoff at every state (e.g. a subsidy).
    money : str, optional
        The utility of one unit of money as an expression of the parameters (e.g.
        ``"-price"`` when ``price`` multiplies a price column): adds the value in money.
        A shift in money is ``shift={choice: amount * utility of money}`` written by hand.
    averager : {"forest", "knn", "cells"} or TransitionAverager, default="forest"
        How the transitions are averaged (module docstring); ``"cells"`` for discrete states.
        A fitted :class:`TransitionAverager` (:func:`fit_averager`) is reused as it is.
    neighbours, folds, seed : int
        The nearest-neighbour averager's neighbours and its fold split of units.
    level : float, default=0.95
        Confidence level.

    Returns
    -------
    Counterfactual
        The tidy table of statistics (baseline, counterfactual, difference) with intervals,
        the CCPs at every row and the solver's record.

    Notes
    -----
    See the module docstring for the solver, the statistics and the influence terms
    :math:`\psi_i = (a_i - n_i\bar g)/n + \nabla_\theta\bar g\cdot\mathrm{IF}_i`. The
    intervals do not include the noise of the transition averager.

    References
    ----------
    Gordon (1995) ICML; Kalouptsidi, Scott & Souza-Rodrigues (2021) Quantitative
    Economics 12.
    """
    t0 = time.perf_counter()
    bound = _checked_inputs(results, panel, model, level)
    params = list(bound.parameters)
    new, shifts = _check_changes(bound, set, shift)
    money_fn = None if money is None else _compile("money", money, params)
    _warn_if_normalisation_moves(bound, shifts)
    avg = (averager if isinstance(averager, TransitionAverager) else
           fit_averager(bound, averager=averager, neighbours=neighbours, folds=folds, seed=seed))
    return _solve_changes(results, panel, bound, avg, [(new, shifts)], money=money,
                          money_fn=money_fn, level=level, t0=t0)[0]


def _solve_changes(
    results: Results,
    panel: Panel,
    bound: BoundModel,
    avg: TransitionAverager,
    changes: list[tuple[dict[str, float], dict[int, float]]],
    *,
    money: str | None,
    money_fn: Any,
    level: float,
    t0: float,
) -> list[Counterfactual]:
    r"""One :class:`Counterfactual` per change (checked ``(set, shift)`` pairs), all against
    one baseline: the baseline and its gradient are solved once."""
    params = list(bound.parameters)
    Z = bound.Z
    beta = float(bound.model.discount)
    theta_hat = results.params.to_numpy(dtype=np.float64)
    unit = panel.unit_codes
    n_units = panel.n_units
    first = np.flatnonzero(np.r_[True, unit[1:] != unit[:-1]])
    rows_per_unit = np.bincount(unit, minlength=n_units).astype(np.float64)
    J = len(panel.choices)
    names = [str(c) for c in panel.choices]

    class _Scenario:
        """One set of payoffs: its solve, warm start, per-unit statistics and gradient."""

        def __init__(self, new: Mapping[str, float], shifts: Mapping[int, float]) -> None:
            self.new, self.shifts = new, shifts
            self.start: np.ndarray | None = None
            self.stats = self.unit_stats(theta_hat, keep=True)
            self.mean = self.stats.mean(axis=0)
            self.grad = central_jacobian(lambda t: self.unit_stats(t).mean(axis=0), theta_hat)

        def unit_stats(self, theta: np.ndarray, *, keep: bool = False) -> np.ndarray:
            r"""(n_units, q) per-unit contributions a_i of every statistic."""
            t = theta.copy()
            for name, value in self.new.items():
                t[params.index(name)] = value
            u = Z @ t
            for j, amount in self.shifts.items():
                u[:, j] = u[:, j] + amount
            sol = solve_on_rows(u, avg, beta, start=self.start)
            counts = _discounted_counts(sol.ccp, avg, beta)
            if keep:
                self.start, self.solution = sol.value, sol
            share = np.zeros((n_units, J))
            np.add.at(share, unit, sol.ccp)
            cols = [share / panel.n_rows * n_units,  # so that the mean over units is the row share
                    counts[first], sol.value[first][:, None]]
            if money_fn is not None:
                cols.append((sol.value[first] / _money(money_fn, theta, params))[:, None])
            return np.hstack(cols)

    # per-unit influence terms, in the results' unit order
    pos = pd.Index(panel.unit_labels).get_indexer(pd.Index(results.influence_units))
    if (pos < 0).any():
        raise InputError(
            "the results' units are not the panel's units: pass the panel the estimate was made on."
        )
    infl = np.zeros((n_units, len(params)))
    infl[pos] = results.influence
    base = _Scenario({}, {})
    # weights: share statistics are row-weighted ratios, the others unit means
    weight = np.ones((n_units, base.stats.shape[1]))
    weight[:, :J] = (rows_per_unit / rows_per_unit.mean())[:, None]
    factor = n_units / (n_units - 1) if results.small_sample else 1.0
    crit = stats.norm.ppf(0.5 + level / 2)
    labels = ([f"share[{c}]" for c in names] + [f"discounted count[{c}]" for c in names]
              + ["value per unit (utils)"] + (["value per unit (money)"] if money_fn else []))
    noise = ("the parameters' estimation noise (through their per-unit influence terms) and "
             "the sampling of units; not the noise of the transition averager")
    out = []
    for new, shifts in changes:
        cf = _Scenario(new, shifts)
        psi = {name: (obj.stats - weight * obj.mean) / n_units + infl @ obj.grad.T
               for name, obj in (("baseline", base), ("counterfactual", cf))}
        psi["difference"] = psi["counterfactual"] - psi["baseline"]
        g = {"baseline": base.mean, "counterfactual": cf.mean, "difference": cf.mean - base.mean}
        records = []
        for k, stat in enumerate(labels):
            for scen in ("baseline", "counterfactual", "difference"):
                se = float(np.sqrt(factor * np.sum(psi[scen][:, k] ** 2)))
                est = float(g[scen][k])
                records.append({"statistic": stat, "scenario": scen, "estimate": est,
                                "std_error": se, "ci_lower": est - crit * se,
                                "ci_upper": est + crit * se})
        table = pd.DataFrame.from_records(records).set_index(["statistic", "scenario"])
        ccp = {s: pd.DataFrame(obj.solution.ccp, columns=names, index=panel.source_index.copy())
               for s, obj in (("baseline", base), ("counterfactual", cf))}
        described = {"set": dict(new), "shift": {names[j]: v for j, v in shifts.items()},
                     "money": money}
        out.append(Counterfactual(
            table=table, ccp=ccp, changes=described, noise=noise,
            iterations={"baseline": base.solution.iterations,
                        "counterfactual": cf.solution.iterations},
            averager=avg, level=level, seconds=time.perf_counter() - t0,
            learner=cross_fit_details(results, needed_by="counterfactual").learner))
    return out


def _money(fn: Any, theta: np.ndarray, params: list[str]) -> float:
    value = float(fn(pd.Series(theta, index=params)))
    if not np.isfinite(value) or value == 0:
        raise InputError(f"money: the utility of one unit of money is {value} at the estimate; "
                         f"it must be a non-zero number.")
    return value


def _warn_if_normalisation_moves(bound: BoundModel, shifts: Mapping[int, float]) -> None:
    r"""A constant shift of a choice with no free constant moves the model's normalisation."""
    if not shifts:
        return
    Z = bound.Z
    for j in shifts:
        constant_cols = [k for k in range(Z.shape[2])
                         if np.ptp(Z[:, j, k]) == 0 and Z[0, j, k] != 0]
        if not constant_cols:
            warnings.warn(
                f"shift of {show_label(bound.panel.choices[j])}: its payoff has no constant "
                f"parameter, so the model normalises its level; a counterfactual that moves it "
                f"depends on that normalisation being the true one (Kalouptsidi, Scott & "
                f"Souza-Rodrigues 2021).",
                OrthoCCPWarning, stacklevel=3,
            )


@dataclass(frozen=True, eq=False)
class DemandCurve:
    """A choice's share against a subsidy of its payoff (:func:`demand_curve`).

    Attributes
    ----------
    table : pandas.DataFrame
        One row per amount: ``amount`` (utils added to the choice's payoff), ``share``,
        ``std_error``, ``ci_lower``, ``ci_upper``, and ``change`` with ``change_se`` (the
        difference from the baseline, amount 0).
    choice : str
        The choice subsidised.
    noise : str
        Which noise the intervals include.
    """

    table: pd.DataFrame
    choice: str
    noise: str
    level: float

    def plot(self, *, path: Any = None) -> Any:
        """The share against the amount with its interval (:func:`orthoccp.figures.demand_plot`)."""
        from .figures import demand_plot

        return demand_plot(self, path=path)


def demand_curve(
    results: Results,
    panel: Panel,
    model: Model,
    *,
    choice: Any,
    amounts: Any,
    averager: str | TransitionAverager = "forest",
    seed: int = 0,
    level: float = 0.95,
) -> DemandCurve:
    r"""The predicted share of ``choice`` as its payoff is shifted by each of ``amounts`` utils.

    Each point is :func:`counterfactual` with ``shift={choice: amount}`` (the same numbers),
    on one fitted averager and one baseline, solved once with its gradient. With the anchor
    as ``choice`` this is the demand curve for renewals (Rust 1987's replacement demand).

    Parameters
    ----------
    results, panel, model
        As for :func:`counterfactual`.
    choice : label
        The choice whose payoff is shifted and whose share is reported.
    amounts : sequence of float
        Utils added to its payoff (at least two; 0 is the baseline).
    averager, seed, level
        As for :func:`counterfactual`.

    Returns
    -------
    DemandCurve
    """
    try:
        values = [float(a) for a in amounts]
    except (TypeError, ValueError) as exc:
        raise InputError(f"amounts must be a list of numbers, got {amounts!r}.") from exc
    if len(values) < 2 or not np.all(np.isfinite(values)):
        raise InputError(f"amounts needs at least two finite numbers, got {amounts!r}.")
    t0 = time.perf_counter()
    bound = _checked_inputs(results, panel, model, level)
    j = find_label(choice, panel.choices, role="choice")
    if j is None:
        raise InputError(f"choice {show_label(choice)} is not a choice (choices: {show_labels(panel.choices)}).")
    label = str(panel.choices[j])
    avg = (averager if isinstance(averager, TransitionAverager)
           else fit_averager(bound, averager=averager, seed=seed))
    points = _solve_changes(results, panel, bound, avg, [({}, {j: a}) for a in values],
                            money=None, money_fn=None, level=level, t0=t0)
    rows = []
    for amount, cf in zip(values, points):
        r = cf.table.loc[f"share[{label}]"]
        rows.append({"amount": amount, "share": r.loc["counterfactual", "estimate"],
                     "std_error": r.loc["counterfactual", "std_error"],
                     "ci_lower": r.loc["counterfactual", "ci_lower"],
                     "ci_upper": r.loc["counterfactual", "ci_upper"],
                     "change": r.loc["difference", "estimate"],
                     "change_se": r.loc["difference", "std_error"]})
    _warn_if_normalisation_moves(bound, {j: 1.0})
    return DemandCurve(pd.DataFrame(rows), label, points[0].noise, level)
