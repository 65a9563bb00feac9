"""Cell-frequency first stages for discrete or binned states.

:class:`CellFrequencyClassifier` and :class:`CellFrequencyRegressor` are the nonparametric
first stage of the classical CCP literature (Hotz & Miller 1993): the CCP at a state is the
empirical choice frequency among the training rows in that state's cell, and a continuation
expectation is the cell mean of its target. A *cell* is one distinct row of the feature matrix
(one value of every state column), so they suit states with a few hundred values at most; for
continuous states bin them first.

Both follow the scikit-learn estimator API and can be passed to :func:`orthoccp.estimate`
(``learner=CellFrequencyClassifier(), regressor=CellFrequencyRegressor()``).

Cells seen in prediction but not in training
--------------------------------------------
``fallback="auto"`` (the default) takes, for a single numeric state column, the nearest seen
cell (the smaller value on a tie), and with several columns the pooled frequency (or mean) of
all training rows. ``"nearest"`` forces the first rule (one column only), ``"pooled"`` the
second. ``unseen(X)`` tells which rows of ``X`` fall in cells not seen in training.
"""

from __future__ import annotations

from typing import Any, Literal

import numpy as np
import pandas as pd
from sklearn.base import BaseEstimator, ClassifierMixin, RegressorMixin
from sklearn.utils.multiclass import check_classification_targets
from sklearn.utils.validation import check_is_fitted

try:  # scikit-learn >= 1.6
    from sklearn.utils.validation import validate_data as _validate_data
except ImportError:  # pragma: no cover - older scikit-learn
    def _validate_data(est: Any, X: Any, y: Any = "no_validation", **kw: Any) -> Any:
        return est._validate_data(X, y, **kw)

__all__ = ["CellFrequencyClassifier", "CellFrequencyRegressor"]

Fallback = Literal["auto", "nearest", "pooled"]


class _Cells:
    """Index of the distinct feature rows seen in training, with lookup of new rows."""

    def __init__(self, X: np.ndarray) -> None:
        self.d = X.shape[1]
        if self.d == 1:
            self.values, self.codes = np.unique(X[:, 0], return_inverse=True)
            self.index: pd.MultiIndex | None = None
        else:
            uniq, codes = np.unique(X, axis=0, return_inverse=True)
            self.values = uniq
            self.codes = codes.reshape(-1)
            self.index = pd.MultiIndex.from_arrays([uniq[:, k] for k in range(self.d)])

    @property
    def n_cells(self) -> int:
        return int(self.values.shape[0])

    def lookup(self, X: np.ndarray) -> np.ndarray:
        """Cell of each row, -1 when the row's cell was not seen in training."""
        if self.index is None:
            x = X[:, 0]
            pos = np.clip(np.searchsorted(self.values, x), 0, self.n_cells - 1)
            return np.where(self.values[pos] == x, pos, -1)
        query = pd.MultiIndex.from_arrays([X[:, k] for k in range(self.d)])
        return np.asarray(self.index.get_indexer(query), dtype=np.int64)

    def nearest(self, X: np.ndarray) -> np.ndarray:
        """Nearest seen cell of each row (one column only; ties go to the smaller value)."""
        x = X[:, 0]
        right = np.clip(np.searchsorted(self.values, x), 0, self.n_cells - 1)
        left = np.clip(right - 1, 0, self.n_cells - 1)
        take_left = np.abs(x - self.values[left]) <= np.abs(self.values[right] - x)
        return np.where(take_left, left, right)


def _check_fallback(fallback: str, d: int) -> str:
    if fallback not in ("auto", "nearest", "pooled"):
        raise ValueError(f"fallback must be 'auto', 'nearest' or 'pooled', got {fallback!r}.")
    if fallback == "nearest" and d != 1:
        raise ValueError(
            f"fallback='nearest' needs exactly one state column, got {d}; use 'pooled' or 'auto'."
        )
    if fallback == "auto":
        return "nearest" if d == 1 else "pooled"
    return fallback


def _check_X(est: Any, X: Any) -> np.ndarray:
    return np.asarray(_validate_data(est, X, dtype=np.float64, reset=False))


def _cell_values(
    cells: _Cells, rule: str, X: np.ndarray, table: np.ndarray, pooled: np.ndarray
) -> np.ndarray:
    """``table[cell]`` for seen cells; the nearest seen cell's or the pooled value otherwise."""
    cell = cells.lookup(X)
    unseen = cell < 0
    if unseen.any():
        cell[unseen] = cells.nearest(X[unseen]) if rule == "nearest" else 0
    out = table[cell]
    if unseen.any() and rule == "pooled":
        out[unseen] = pooled
    return np.asarray(out)


def _weights(sample_weight: Any, n: int) -> np.ndarray:
    if sample_weight is None:
        return np.ones(n)
    w = np.asarray(sample_weight, dtype=np.float64).reshape(-1)
    if w.shape != (n,) or not np.all(np.isfinite(w)) or w.min() < 0:
        raise ValueError(f"sample_weight must hold {n} finite non-negative weights.")
    if w.sum() <= 0:
        raise ValueError("sample_weight is zero for every row; at least one weight must be > 0.")
    return w


class CellFrequencyClassifier(ClassifierMixin, BaseEstimator):  # type: ignore[misc]
    """Choice probabilities as smoothed choice frequencies within each state cell.

    Parameters
    ----------
    alpha : float, default=0.0
        Additive (Laplace/Lidstone) smoothing: ``alpha`` pseudo-counts per class in every
        cell. 0 gives the raw frequencies, which can be exactly 0 or 1.
    fallback : {"auto", "nearest", "pooled"}, default="auto"
        Rule for cells not seen in training (module docstring): ``"auto"`` uses the nearest
        seen cell with one state column and the pooled frequency otherwise.

    Attributes
    ----------
    classes_ : numpy.ndarray
        Sorted class labels; the columns of :meth:`predict_proba`.
    n_features_in_ : int
        Number of state columns.
    n_cells_ : int
        Distinct cells seen in training.
    cell_proba_ : numpy.ndarray
        (n_cells, n_classes) probabilities of the seen cells.
    pooled_proba_ : numpy.ndarray
        (n_classes,) smoothed pooled frequency of the training rows.

    Notes
    -----
    For a cell :math:`c` with weighted class counts :math:`n_{ck}` and :math:`K` classes,

    .. math::

        \\hat P(k \\mid c) = \\frac{n_{ck} + \\alpha}{\\sum_l n_{cl} + K \\alpha},

    the frequency estimator of Hotz & Miller (1993) (with :math:`\\alpha = 0`); the pooled
    fallback is the same formula over all rows. It is consistent for a discrete state as
    every cell's count grows, but noisy where a cell holds few rows and exactly zero where a
    choice was never seen in a cell, which orthoccp's clipping then bounds.

    References
    ----------
    Hotz, V. J. and Miller, R. A. (1993). Conditional choice probabilities and the estimation
    of dynamic models. Review of Economic Studies 60(3), 497--529.

    Examples
    --------
    >>> import numpy as np
    >>> X = np.array([[0.0], [0.0], [0.0], [1.0], [1.0]])
    >>> clf = CellFrequencyClassifier().fit(X, ["a", "a", "b", "b", "b"])
    >>> clf.predict_proba(np.array([[0.0], [3.0]])).round(3).tolist()
    [[0.667, 0.333], [0.0, 1.0]]
    """

    def __init__(self, *, alpha: float = 0.0, fallback: Fallback = "auto") -> None:
        self.alpha = alpha
        self.fallback = fallback

    def fit(self, X: Any, y: Any, sample_weight: Any = None) -> CellFrequencyClassifier:
        """Count the classes within each distinct row of ``X``.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_features)
            State columns (finite numbers).
        y : array-like of shape (n_samples,)
            Class labels.
        sample_weight : array-like of shape (n_samples,), optional
            Row weights (counts are weighted sums).

        Returns
        -------
        CellFrequencyClassifier
            The fitted estimator.
        """
        X, y = _validate_data(self, X, y, dtype=np.float64)
        check_classification_targets(y)
        alpha = float(self.alpha)
        if not np.isfinite(alpha) or alpha < 0:
            raise ValueError(f"alpha must be a finite number >= 0, got {self.alpha!r}.")
        self._rule = _check_fallback(self.fallback, X.shape[1])
        w = _weights(sample_weight, X.shape[0])
        self.classes_, y_codes = np.unique(y, return_inverse=True)
        K = self.classes_.size
        # Rows of weight 0 carry no information: they do not make their cell "seen".
        keep = w > 0
        cells = _Cells(X[keep])
        flat = cells.codes * K + y_codes.reshape(-1)[keep]
        counts = np.bincount(flat, weights=w[keep], minlength=cells.n_cells * K).reshape(cells.n_cells, K)
        self._cells = cells
        pooled = counts.sum(axis=0)
        self.pooled_proba_ = (pooled + alpha) / (pooled.sum() + K * alpha)
        self.cell_proba_ = (counts + alpha) / (counts.sum(axis=1, keepdims=True) + K * alpha)
        self.n_cells_ = cells.n_cells
        return self

    def predict_proba(self, X: Any) -> np.ndarray:
        """Cell probabilities of each row (fallback for unseen cells).

        Parameters
        ----------
        X : array-like of shape (n_samples, n_features)

        Returns
        -------
        numpy.ndarray
            (n_samples, n_classes), columns in the order of ``classes_``; rows sum to one.
        """
        check_is_fitted(self, "cell_proba_")
        X = _check_X(self, X)
        return _cell_values(self._cells, self._rule, X, self.cell_proba_, self.pooled_proba_)

    def unseen(self, X: Any) -> np.ndarray:
        """Boolean mask of the rows of ``X`` whose cell was not seen in training."""
        check_is_fitted(self, "n_cells_")
        return np.asarray(self._cells.lookup(_check_X(self, X)) < 0)

    def predict(self, X: Any) -> np.ndarray:
        """Most frequent class of each row's cell (the first class on a tie)."""
        proba = self.predict_proba(X)
        return np.asarray(self.classes_[np.argmax(proba, axis=1)])


class CellFrequencyRegressor(RegressorMixin, BaseEstimator):  # type: ignore[misc]
    """Conditional mean as the mean of the target within each state cell.

    Parameters
    ----------
    fallback : {"auto", "nearest", "pooled"}, default="auto"
        Rule for cells not seen in training (module docstring): ``"auto"`` uses the nearest
        seen cell with one state column and the pooled mean otherwise.

    Attributes
    ----------
    n_features_in_ : int
        Number of state columns.
    n_cells_ : int
        Distinct cells seen in training.
    cell_mean_ : numpy.ndarray
        (n_cells,) mean of the target in each seen cell.
    pooled_mean_ : float
        Mean of the target over all training rows.

    Notes
    -----
    :math:`\\hat\\mu(c) = \\sum_{i \\in c} w_i y_i / \\sum_{i \\in c} w_i`: the least-squares fit
    of a saturated model with one indicator per cell.

    Examples
    --------
    >>> import numpy as np
    >>> X = np.array([[0.0], [0.0], [2.0]])
    >>> CellFrequencyRegressor().fit(X, [1.0, 3.0, 5.0]).predict(np.array([[0.0], [1.5]])).tolist()
    [2.0, 5.0]
    """

    def __init__(self, *, fallback: Fallback = "auto") -> None:
        self.fallback = fallback

    def fit(self, X: Any, y: Any, sample_weight: Any = None) -> CellFrequencyRegressor:
        """Average ``y`` within each distinct row of ``X``.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_features)
            State columns (finite numbers).
        y : array-like of shape (n_samples,)
            Target.
        sample_weight : array-like of shape (n_samples,), optional
            Row weights.

        Returns
        -------
        CellFrequencyRegressor
            The fitted estimator.
        """
        X, y = _validate_data(self, X, y, dtype=np.float64, y_numeric=True)
        self._rule = _check_fallback(self.fallback, X.shape[1])
        w = _weights(sample_weight, X.shape[0])
        # Rows of weight 0 carry no information: they do not make their cell "seen".
        keep = w > 0
        X, y, w = X[keep], y[keep], w[keep]
        cells = _Cells(X)
        wsum = np.bincount(cells.codes, weights=w, minlength=cells.n_cells)
        ysum = np.bincount(cells.codes, weights=w * y, minlength=cells.n_cells)
        self.cell_mean_ = ysum / wsum
        self.pooled_mean_ = float(np.sum(w * y) / np.sum(w))
        self._cells = cells
        self.n_cells_ = cells.n_cells
        return self

    def predict(self, X: Any) -> np.ndarray:
        """Cell mean of each row (fallback for unseen cells).

        Parameters
        ----------
        X : array-like of shape (n_samples, n_features)

        Returns
        -------
        numpy.ndarray
            (n_samples,) predictions.
        """
        check_is_fitted(self, "cell_mean_")
        X = _check_X(self, X)
        pooled = np.asarray(self.pooled_mean_)
        return _cell_values(self._cells, self._rule, X, self.cell_mean_, pooled)

    def unseen(self, X: Any) -> np.ndarray:
        """Boolean mask of the rows of ``X`` whose cell was not seen in training."""
        check_is_fitted(self, "n_cells_")
        return np.asarray(self._cells.lookup(_check_X(self, X)) < 0)
