"""What the user declares: nuisances, where the moment evaluates them, and the data view.

A :class:`Nuisance` is a conditional expectation :math:`\\gamma(Z) = E[Y \\mid Z]` with

* a *target* Y: a data column, or a function of the data and of earlier nuisances' values
  (a generated target, e.g. :math:`\\ln \\hat P_R(x_{t+1})`);
* *features* Z: data columns (categorical columns become indicator columns);
* optionally ``by``: a discrete column whose every value gets its own fit (Z then includes
  that column, as a stratum);
* *evaluation points* ``at``: named places where the user's moment reads the nuisance —
  ``"row"`` (the row itself), ``"next"`` (the unit's next row) or a mapping of counterfactual
  column values (e.g. ``{"action": "keep"}``). The value at the row itself is always
  available under the nuisance's own name.
"""

from __future__ import annotations

from collections.abc import Callable, Hashable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Union

import numpy as np
import pandas as pd
from pandas.api import types as ptypes

from .._errors import InputError
from .._labels import find_label, show_label, show_labels
from ..data import Panel, _state_matrix

__all__ = ["Nuisance", "Rows", "Point", "ResolvedPoint"]

Point = Union[str, Mapping[str, Any]]
"""An evaluation point: ``"row"``, ``"next"`` or ``{column: counterfactual value}``."""

Target = Union[str, Callable[["Rows", Mapping[str, np.ndarray]], Any]]


class Rows:
    """The data as the user's functions see it: columns as NumPy arrays, one entry per row.

    Rows are in the panel's order (sorted by unit and period). ``rows["col"]`` is a column;
    ``rows.next("col")`` is the same column at the unit's next row (NaN, or None for text
    columns, where the unit has no next row).

    Attributes
    ----------
    frame : pandas.DataFrame
        The sorted data.
    next_row : numpy.ndarray
        Index of each row's next row, -1 where there is none.
    """

    def __init__(self, panel: Panel) -> None:
        self.frame = panel.frame
        self.next_row = panel.next_row
        self._cache: dict[str, np.ndarray] = {}

    @property
    def n_rows(self) -> int:
        return int(self.frame.shape[0])

    @property
    def has_next(self) -> np.ndarray:
        """True where the unit's next period is observed."""
        return self.next_row >= 0

    def __getitem__(self, column: str) -> np.ndarray:
        if column not in self._cache:
            if column not in self.frame.columns:
                raise InputError(
                    f"column {column!r} is not in the data; available: "
                    f"{', '.join(map(str, self.frame.columns[:12]))}"
                    + (", ..." if self.frame.shape[1] > 12 else "")
                    + "."
                )
            s = self.frame[column]
            if ptypes.is_bool_dtype(s) or ptypes.is_numeric_dtype(s):
                values = s.to_numpy(dtype=np.float64, na_value=np.nan)
            else:
                values = s.to_numpy(dtype=object)
            values.setflags(write=False)
            self._cache[column] = values
        return self._cache[column]

    def next(self, column: str) -> np.ndarray:
        """``column`` at the unit's next row (NaN or None where there is none)."""
        values = self[column]
        linked = self.has_next
        if values.dtype == object:
            out = np.full(self.n_rows, None, dtype=object)
        else:
            out = np.full(self.n_rows, np.nan)
        out[linked] = values[self.next_row[linked]]
        return out


@dataclass(frozen=True, kw_only=True)
class Nuisance:
    """A conditional expectation :math:`\\gamma(Z) = E[Y \\mid Z]` that the moment uses.

    Parameters
    ----------
    name : str
        Key of the nuisance's own-row value :math:`\\gamma(Z_t)` in the mapping the moment
        function receives.
    target : str or callable
        A data column, or ``target(rows, nu) -> array`` of one value per row computed from
        the data (:class:`Rows`) and the values of nuisances listed *earlier* (``nu``).
        Rows where the target is NaN do not train the nuisance (e.g. rows without a next row).
    features : sequence of str
        Columns Z the learner sees (numeric, boolean or categorical).
    learner : str or estimator, default="lightgbm"
        A registry name (:func:`orthoccp.learner_names`) or any scikit-learn-style estimator
        (cloned per fold; ``predict_proba`` when ``binary``, else ``predict``).
    binary : bool, default=False
        The target is 0/1 and :math:`\\gamma` a probability: fitted with a classifier and
        clipped to ``[clip, 1 - clip]``.
    by : str, optional
        A discrete column; each of its values gets a separate fit on the rows having it.
    at : mapping, default={}
        Label -> evaluation point: ``"row"``, ``"next"`` or ``{column: value}``
        (a counterfactual value of ``by`` or of a numeric feature, at the row itself).
        The moment receives ``nu[label]``; labels must differ from all nuisance names.
    dictionary : str or callable, default="quadratic"
        Functions b(Z) for the Riesz regression: ``"linear"``, ``"quadratic"`` (with
        interactions), ``"saturated"`` (an indicator per distinct feature row), or
        ``dictionary(features: DataFrame) -> array`` (n, p). With ``by`` the dictionary is
        interacted with the stratum indicators.
    by_probability : callable, optional
        ``by_probability(theta, rows, nu) -> {value: array}``: the probability, implied by
        the user's model at ``theta``, that a moment row falls in each stratum of ``by``
        given the features (in a choice model, the model's choice probabilities
        :math:`\\Lambda_j(\\theta)`). Only with ``by``. Values read at a counterfactual
        stratum s (``at={...: {by: s}}``) are then corrected with the inverse-probability
        weight :math:`\\alpha_t = D_t / \\pi_s(\\theta; x_t)` on the rows of stratum s,
        instead of a Riesz regression; see :mod:`orthoccp.custom._riesz`.

    Examples
    --------
    >>> ccp = Nuisance(name="p_swap", target=lambda rows, nu: rows["action"] == "swap",
    ...                features=["wear"], learner="logit", binary=True, at={"p_next": "next"})
    >>> ccp.labels
    ('p_swap', 'p_next')
    """

    name: str
    target: Target
    features: Sequence[str]
    learner: Any = "lightgbm"
    binary: bool = False
    by: str | None = None
    at: Mapping[str, Point] = field(default_factory=dict)
    dictionary: str | Callable[[pd.DataFrame], Any] = "quadratic"
    by_probability: Callable[[np.ndarray, "Rows", Mapping[str, np.ndarray]], Any] | None = None

    def __post_init__(self) -> None:
        if not isinstance(self.name, str) or not self.name:
            raise InputError(f"Nuisance name must be a non-empty string, got {self.name!r}.")
        if not (isinstance(self.target, str) or callable(self.target)):
            raise InputError(
                f"Nuisance {self.name!r}: target must be a column name or a function "
                f"target(rows, nu), got {type(self.target).__name__}."
            )
        feats = self.features
        if isinstance(feats, str) or not isinstance(feats, Sequence) or not feats:
            raise InputError(
                f"Nuisance {self.name!r}: features must be a non-empty list of column names, "
                f"got {feats!r}."
            )
        if len(set(feats)) != len(feats):
            raise InputError(f"Nuisance {self.name!r}: a feature is listed twice in {list(feats)}.")
        object.__setattr__(self, "features", tuple(feats))
        if not isinstance(self.binary, (bool, np.bool_)):
            raise InputError(f"Nuisance {self.name!r}: binary must be True or False, got {self.binary!r}.")
        if self.by is not None and (not isinstance(self.by, str) or self.by in feats):
            raise InputError(
                f"Nuisance {self.name!r}: by={self.by!r} must be a column name that is not "
                f"also a feature (its values define separate fits)."
            )
        if self.by_probability is not None and (self.by is None or not callable(self.by_probability)):
            raise InputError(
                f"Nuisance {self.name!r}: by_probability must be a function "
                f"by_probability(theta, rows, nu) -> {{value: probability}} and needs by=..., "
                f"got by={self.by!r}, by_probability={type(self.by_probability).__name__}."
            )
        if not isinstance(self.at, Mapping):
            raise InputError(
                f"Nuisance {self.name!r}: at must map labels to points, e.g. "
                f"{{'p_next': 'next'}}, got {self.at!r}."
            )
        for label, point in self.at.items():
            if not isinstance(label, str) or not label or label == self.name:
                raise InputError(
                    f"Nuisance {self.name!r}: evaluation label {label!r} must be a non-empty "
                    f"string different from the nuisance's name."
                )
            _check_point(self, label, point)
        object.__setattr__(self, "at", dict(self.at))

    @property
    def labels(self) -> tuple[str, ...]:
        """Keys this nuisance adds to the mapping the moment receives (own row first)."""
        return (self.name, *self.at)

    def points(self) -> dict[str, Point]:
        """Label -> point, the own-row value first."""
        return {self.name: "row", **self.at}


def _check_point(nu: Nuisance, label: str, point: Any) -> None:
    if isinstance(point, str):
        if point not in ("row", "next"):
            raise InputError(
                f"Nuisance {nu.name!r}: at[{label!r}] = {point!r} is not a point; use 'row', "
                f"'next' or a mapping of counterfactual values such as {{'choice': 1}}."
            )
        return
    if not isinstance(point, Mapping) or not point:
        raise InputError(
            f"Nuisance {nu.name!r}: at[{label!r}] must be 'row', 'next' or a non-empty mapping "
            f"{{column: value}}, got {point!r}."
        )
    for col in point:
        if col != nu.by and col not in nu.features:
            raise InputError(
                f"Nuisance {nu.name!r}: at[{label!r}] sets column {col!r}, which is neither "
                f"by={nu.by!r} nor one of the features; a counterfactual must change an input "
                f"of the nuisance."
            )


@dataclass(frozen=True)
class ResolvedPoint:
    """An evaluation point turned into row indices, a feature matrix and strata.

    ``source[t]`` is the row whose features are used for row t (t itself, its next row, or
    -1 where undefined); ``X`` the features (NaN rows where undefined); ``stratum`` the
    stratum code per row (-1 where undefined or unseen).
    """

    label: str
    kind: str
    source: np.ndarray
    X: np.ndarray
    stratum: np.ndarray

    @property
    def defined(self) -> np.ndarray:
        return self.source >= 0


@dataclass(frozen=True, eq=False)
class NuisanceDesign:
    """A nuisance bound to the data: feature matrix, strata, points and the dictionary frame."""

    spec: Nuisance
    X: np.ndarray
    feature_names: tuple[str, ...]
    strata: tuple[Hashable, ...]
    stratum: np.ndarray
    points: dict[str, ResolvedPoint]
    frame: pd.DataFrame

    @property
    def name(self) -> str:
        return self.spec.name


def _stratum_codes(values: np.ndarray, strata: tuple[Hashable, ...]) -> np.ndarray:
    lookup = {s: k for k, s in enumerate(strata)}
    return np.array([lookup.get(v, -1) for v in values.tolist()], dtype=np.int64)


def bind_nuisance(spec: Nuisance, panel: Panel, rows: Rows) -> NuisanceDesign:
    """Feature matrix, strata and resolved evaluation points of one nuisance."""
    for col in (*spec.features, *([spec.by] if spec.by else [])):
        if col not in panel.frame.columns:
            raise InputError(
                f"Nuisance {spec.name!r}: column {col!r} is not in the data."
            )
    X, names, _ = _state_matrix(panel.frame, spec.features)
    n = panel.n_rows
    if spec.by is None:
        strata: tuple[Hashable, ...] = (None,)
        stratum = np.zeros(n, dtype=np.int64)
    else:
        by_values = panel.frame[spec.by]
        if by_values.isna().any():
            raise InputError(f"Nuisance {spec.name!r}: by column {spec.by!r} has missing values.")
        strata = tuple(pd.unique(by_values).tolist())
        try:
            strata = tuple(sorted(strata))  # type: ignore[type-var]
        except TypeError:
            pass
        stratum = _stratum_codes(by_values.to_numpy(dtype=object), strata)
    frame = pd.DataFrame(X, columns=list(names))
    points: dict[str, ResolvedPoint] = {}
    for label, point in spec.points().items():
        if point == "row":
            points[label] = ResolvedPoint(label, "row", np.arange(n), X, stratum)
        elif point == "next":
            src = rows.next_row.copy()
            Xn = np.full_like(X, np.nan)
            Xn[src >= 0] = X[src[src >= 0]]
            st = np.where(src >= 0, stratum[np.maximum(src, 0)], -1)
            points[label] = ResolvedPoint(label, "next", src, Xn, st)
        else:
            assert isinstance(point, Mapping)
            Xc = X.copy()
            st = stratum.copy()
            for col, value in point.items():
                if col == spec.by:
                    hit = find_label(value, strata, role=f"at[{label!r}][{col!r}]")
                    if hit is None:
                        raise InputError(
                            f"Nuisance {spec.name!r}: at[{label!r}] sets {col!r} to "
                            f"{show_label(value)}, which never occurs in the data (values: "
                            f"{show_labels(strata)})."
                        )
                    st = np.full(n, hit, dtype=np.int64)
                else:
                    if col not in names:
                        raise InputError(
                            f"Nuisance {spec.name!r}: at[{label!r}] sets categorical feature "
                            f"{col!r}; counterfactual values need a numeric feature or the by "
                            f"column. Use by={col!r} for a discrete choice column."
                        )
                    if isinstance(value, (bool, np.bool_)) or not isinstance(
                        value, (int, float, np.integer, np.floating)
                    ):
                        raise InputError(
                            f"Nuisance {spec.name!r}: at[{label!r}][{col!r}] must be a number, "
                            f"got {value!r}."
                        )
                    Xc[:, names.index(col)] = float(value)
            points[label] = ResolvedPoint(label, "counterfactual", np.arange(n), Xc, st)
    return NuisanceDesign(spec, X, names, strata, stratum, points, frame)
