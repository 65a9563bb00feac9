"""Spec files: the TOML description of a panel, a model and the estimation options.

A spec file has the tables ``[data]``, ``[model]``, ``[utility.<choice>]`` (one per choice
with parameters), and the optional ``[first_stage]`` and ``[inference]``::

    [data]
    unit = "bike"
    period = "week"
    choice = "action"
    states = ["wear", "x0", "x1"]
    path = "panel.csv"            # optional, relative to the spec file
    missing = "error"             # optional: "drop" drops rows with missing values

    [model]
    kind = "renewal"
    anchor = "swap"
    discount = 0.95
    persistent = ["x0"]           # optional

    [utility.keep]
    wear_cost = "wear_scaled"     # parameter = column ("1" is a constant)

    [utility.swap]
    swap_cost = "1"

    [first_stage]                 # optional
    learner = "lightgbm"
    folds = 5
    seed = 0

    [inference]                   # optional
    cov = "clustered"

:func:`read_spec` parses and validates a file into a frozen :class:`Spec`; every error is a
:class:`SpecError` (an :class:`~orthoccp.InputError`) whose message names the file, the key,
the expected type and the offending value. :func:`write_spec` writes a spec (or any nested
mapping of TOML values) back to disk. :func:`read_data` and :func:`write_data` handle the
panel files (CSV, or Parquet through pyarrow).
"""

from __future__ import annotations

import dataclasses
import importlib.util
import math
import os
import re
import sys
from collections.abc import Callable, Hashable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType
from typing import Any

import numpy as np
import pandas as pd
from pandas.api import types as ptypes

from ._errors import InputError
from .covariance import covariance_names
from .data import Panel
from .learners import learner_names
from .model import CONSTANT, Model

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised on Python 3.10 only
    import tomli as tomllib

__all__ = [
    "DataSpec",
    "EstimatorSpec",
    "FirstStageSpec",
    "InferenceSpec",
    "ModelSpec",
    "Spec",
    "SpecError",
    "data_format",
    "data_stem",
    "dumps_toml",
    "parse_spec",
    "read_data",
    "read_spec",
    "write_data",
    "write_spec",
]

KINDS = ("renewal", "terminal")
SCHEMES = ("plain", "nested")
MOMENTS = ("standard", "renewal_robust")
MISSING = ("error", "drop")
METHODS = ("orthogonal", "npl", "pml")
VALUES = ("inversion", "simulation")
TRANSITIONS = ("frequency", "increments")
INITIAL_CCPS = ("frequency", "sieve")
CSV_SUFFIXES = (".csv", ".csv.gz", ".csv.bz2", ".csv.xz", ".csv.zip")
PARQUET_SUFFIXES = (".parquet", ".pq")


class SpecError(InputError):
    """A spec file (or a spec option) that is malformed, mistyped or inconsistent.

    Parameters
    ----------
    message : str
        Full message; it names the file, the key and the offending value.
    key : str, optional
        Dotted key the error is about (``"first_stage.folds"``), for programmatic use.
    """

    def __init__(self, message: str, *, key: str | None = None) -> None:
        super().__init__(message)
        self.key = key


# --------------------------------------------------------------------------- dataclasses
@dataclass(frozen=True)
class DataSpec:
    """The ``[data]`` table: which columns play which role.

    Attributes
    ----------
    unit, period, choice : str
        Columns of the decision maker, the integer period and the chosen alternative.
    states : tuple of str
        Columns the first-stage learners see.
    path : pathlib.Path or None
        Data file, already resolved against the spec's folder; ``None`` when not given.
    missing : {"error", "drop"}
        What :meth:`Spec.build_panel` does with rows that have missing or infinite values
        (see :class:`~orthoccp.Panel`); ``"drop"`` also covers the utility columns.
    """

    unit: str
    period: str
    choice: str
    states: tuple[str, ...]
    path: Path | None = None
    missing: str = "error"


@dataclass(frozen=True)
class ModelSpec:
    """The ``[model]`` table.

    Attributes
    ----------
    kind : {"renewal", "terminal"} or None
        Kind of the anchor choice (``None`` only for the discrete-state estimators, which
        need no anchor).
    anchor : str or int or None
        Anchor label as written in the file; matched to the data's labels by
        :meth:`Spec.build_model`.
    discount : float
        Discount factor in ``[0, 1)``.
    persistent : tuple of str
        States a renewal does not reset.
    """

    kind: str | None
    anchor: str | int | None
    discount: float
    persistent: tuple[str, ...] = ()


@dataclass(frozen=True)
class FirstStageSpec:
    """The ``[first_stage]`` table (all keys optional).

    A key left out is ``None`` here and is not passed to :func:`orthoccp.estimate`, so the
    estimator's own default applies (``learner="lightgbm"``, ``folds=5``, ``seed=0``, ...).

    Attributes
    ----------
    learner : str or None
        CCP learner name (see :func:`orthoccp.learner_names`).
    regressor : str or None
        Continuation regressor name (default: the learner's partner).
    folds : int or None
        Cross-fitting folds (>= 2).
    seed : int or None
        Seed of the fold split and the learners (>= 0).
    splits : int or None
        Repeated cross-fitting splits (>= 1).
    scheme : {"plain", "nested"} or None
        Cross-fitting scheme of the continuation target.
    clip : float or None
        Probability clip bound in (0, 0.5).
    model_ccp_steps : int or None
        Model-implied CCP steps after the first solve (>= 0; needs the standard moment).
    """

    learner: str | None = None
    regressor: str | None = None
    folds: int | None = None
    seed: int | None = None
    splits: int | None = None
    scheme: str | None = None
    clip: float | None = None
    model_ccp_steps: int | None = None


@dataclass(frozen=True)
class InferenceSpec:
    """The ``[inference]`` table (all keys optional; ``None`` = the estimator's default).

    Attributes
    ----------
    cov : str or None
        Covariance type (see :func:`orthoccp.covariance_names`; default ``"clustered"``).
    small_sample : bool or None
        Apply the n/(n-1) factor (default true).
    debias : bool or None
        ``False`` selects the plug-in estimator (default true).
    moments : {"standard", "renewal_robust"} or None
        Moment type; by default :func:`orthoccp.estimate` chooses (renewal-robust for
        debiased renewal models that declare persistent states).
    """

    cov: str | None = None
    small_sample: bool | None = None
    debias: bool | None = None
    moments: str | None = None


@dataclass(frozen=True)
class EstimatorSpec:
    """The ``[estimator]`` table: which estimator runs (all keys optional).

    Attributes
    ----------
    method : {"orthogonal", "npl", "pml"}
        ``"orthogonal"`` (default): :func:`orthoccp.estimate`, cross-fitted first stages and
        the orthogonal finite-dependence moments. ``"npl"`` and ``"pml"``:
        :func:`orthoccp.estimate_discrete` for discrete states (NPL iterations, or
        pseudo-likelihood steps); they need no anchor and fit no learner.
    values, transitions, smoothing, reset_choices, n_states, steps, max_iterations, tol, n_paths, horizon, initial_ccp, sieve_degree
        Options of :func:`orthoccp.estimate_discrete` (``None``: its default); only with
        ``method = "npl"`` or ``"pml"``.
    """

    method: str = "orthogonal"
    values: str | None = None
    transitions: str | None = None
    smoothing: float | None = None
    reset_choices: tuple[str, ...] | None = None
    n_states: int | None = None
    steps: int | None = None
    max_iterations: int | None = None
    tol: float | None = None
    n_paths: int | None = None
    horizon: int | None = None
    initial_ccp: str | None = None
    sieve_degree: int | None = None

    @property
    def discrete(self) -> bool:
        """True for the discrete-state estimators."""
        return self.method != "orthogonal"


@dataclass(frozen=True)
class Spec:
    """A validated spec: data roles, model, utilities and estimation options.

    Attributes
    ----------
    data : DataSpec
        Column roles and the optional data file.
    model : ModelSpec
        Kind, anchor, discount and persistent states.
    utility : Mapping
        Choice label (as written in the file: table keys are strings) -> parameter name ->
        column (``"1"`` is a constant). Read-only.
    first_stage : FirstStageSpec
        Learner and cross-fitting options.
    inference : InferenceSpec
        Covariance and estimator options.
    estimator : EstimatorSpec
        Which estimator runs (default the orthogonal CCP estimator).
    source : pathlib.Path or None
        File the spec was read from.

    Examples
    --------
    >>> spec = parse_spec({
    ...     "data": {"unit": "id", "period": "t", "choice": "a", "states": ["x"]},
    ...     "model": {"kind": "renewal", "anchor": "swap", "discount": 0.9},
    ...     "utility": {"keep": {"cost": "x"}, "swap": {"swap_cost": "1"}},
    ... })
    >>> spec.parameters
    ('cost', 'swap_cost')
    >>> spec.estimate_options()  # nothing set: the estimator's defaults apply
    {}
    >>> spec.with_options(learner="logit", folds=3).estimate_options()
    {'learner': 'logit', 'folds': 3}
    """

    data: DataSpec
    model: ModelSpec
    utility: Mapping[str, Mapping[str, str]]
    first_stage: FirstStageSpec = field(default_factory=FirstStageSpec)
    inference: InferenceSpec = field(default_factory=InferenceSpec)
    source: Path | None = None
    estimator: EstimatorSpec = field(default_factory=EstimatorSpec)

    @property
    def parameters(self) -> tuple[str, ...]:
        """Parameter names in order of first appearance in the utility tables."""
        names: list[str] = []
        for params in self.utility.values():
            for name in params:
                if name not in names:
                    names.append(name)
        return tuple(names)

    # ------------------------------------------------------------------ options
    def with_options(
        self,
        *,
        learner: str | None = None,
        folds: int | None = None,
        seed: int | None = None,
        debias: bool | None = None,
    ) -> Spec:
        """A copy with some options replaced (``None`` keeps the spec's value).

        Parameters
        ----------
        learner : str, optional
            Replaces ``first_stage.learner``.
        folds : int, optional
            Replaces ``first_stage.folds``.
        seed : int, optional
            Replaces ``first_stage.seed``.
        debias : bool, optional
            Replaces ``inference.debias``.

        Returns
        -------
        Spec

        Raises
        ------
        SpecError
            When a value is out of range; the message names the command-line option.
        """
        fs = self.first_stage
        chk = _Checker(None)
        if learner is not None:
            fs = dataclasses.replace(fs, learner=chk.choice("--learner", learner, learner_names()))
        if folds is not None:
            fs = dataclasses.replace(fs, folds=chk.integer("--folds", folds, minimum=2))
        if seed is not None:
            fs = dataclasses.replace(fs, seed=chk.integer("--seed", seed, minimum=0))
        inf = self.inference
        if debias is not None:
            inf = dataclasses.replace(inf, debias=chk.boolean("debias", debias))
        return dataclasses.replace(self, first_stage=fs, inference=inf)

    def estimate_options(self) -> dict[str, Any]:
        """Keyword arguments for :func:`orthoccp.estimate` (everything but panel and model).

        Returns
        -------
        dict
            The options the spec sets, among ``learner, regressor, folds, seed, splits,
            scheme, clip, model_ccp_steps, cov, small_sample, debias, moments``; options it
            leaves out are
            not passed, so the estimator's defaults apply.
        """
        merged = {**dataclasses.asdict(self.first_stage), **dataclasses.asdict(self.inference)}
        return {k: v for k, v in merged.items() if v is not None}

    # ------------------------------------------------------------------ data
    def data_path(self, override: str | os.PathLike[str] | None = None) -> Path:
        """The data file: ``override`` (relative to the working directory) or ``data.path``.

        Raises
        ------
        SpecError
            When neither is given.
        """
        if override is not None:
            return Path(override)
        if self.data.path is None:
            raise SpecError(
                f"{_where(self.source)}no data file: pass DATA on the command line or set "
                f"path in [data] (relative to the spec file).",
                key="data.path",
            )
        return self.data.path

    def load_data(self, override: str | os.PathLike[str] | None = None) -> pd.DataFrame:
        """Read the data file named by :meth:`data_path` (see :func:`read_data`)."""
        return read_data(self.data_path(override))

    def build_panel(self, frame: pd.DataFrame) -> Panel:
        """Wrap ``frame`` as a :class:`~orthoccp.Panel` with the spec's column roles.

        Parameters
        ----------
        frame : pandas.DataFrame
            The panel data.

        Returns
        -------
        Panel

        Raises
        ------
        SpecError
            When a column named in ``[data]`` is not in ``frame``.
        orthoccp.InputError
            When the data fail the panel's checks (duplicates, text in a state, ...).
        """
        d = self.data
        for key, name in (("unit", d.unit), ("period", d.period), ("choice", d.choice)):
            self._require_column(frame, f"data.{key}", name)
        for name in d.states:
            self._require_column(frame, "data.states", name)
        # With missing = "drop" a row missing a utility value is dropped too; with "error"
        # such a row is reported here, worded for the spec file.
        extra: list[str] = []
        for label, params in self.utility.items():
            for name, column in params.items():
                if column == CONSTANT or column in extra or column not in frame.columns:
                    continue
                extra.append(column)
                values = frame[column]
                if d.missing == "error" and ptypes.is_numeric_dtype(values):
                    n_bad = int((~np.isfinite(values.to_numpy(np.float64, na_value=np.nan))).sum())
                    if n_bad:
                        key = f"utility.{_toml_key(label)}.{_toml_key(name)}"
                        raise InputError(
                            f"{key}: utility column {column!r} has {n_bad} missing or infinite "
                            f"values; drop or impute those rows, or set missing = \"drop\" in "
                            f"[data]."
                        )
        try:
            return Panel(
                frame,
                unit=d.unit,
                period=d.period,
                choice=d.choice,
                states=list(d.states),
                missing=d.missing,  # type: ignore[arg-type]
                extra_columns=extra if d.missing == "drop" else (),
            )
        except InputError as exc:
            text = str(exc)
            if "missing='drop'" not in text:
                raise
            raise InputError(text.replace("pass missing='drop'", 'set missing = "drop" in [data]')) from exc

    def build_model(self, data: pd.DataFrame | Panel) -> Model:
        """The :class:`~orthoccp.Model`, with choice labels matched to the data's labels.

        TOML table keys are always strings, so ``[utility.1]`` and ``anchor = 1`` (or
        ``"1"``) are matched to the integer label ``1`` when the data's choice column holds
        integers; string labels are matched as written.

        Parameters
        ----------
        data : pandas.DataFrame or Panel
            The data whose choice column fixes the labels.

        Returns
        -------
        Model

        Raises
        ------
        SpecError
            When the anchor or a utility choice is not observed, or a utility column is
            not in the data.
        """
        if self.model.kind is None or self.model.anchor is None:
            raise SpecError(
                f"{_where(self.source)}model.kind and model.anchor are required by the "
                f"orthogonal estimator.",
                key="model",
            )
        _, observed, integer_labels = self._observed(data)
        anchor = self._match_choice("model.anchor", self.model.anchor, observed, integer_labels)
        utility = self._matched_utility(data)
        return Model(
            anchor=anchor,
            kind=self.model.kind,  # type: ignore[arg-type]
            discount=self.model.discount,
            utility=utility,
            persistent=self.model.persistent,
        )

    def build_utility(self, data: pd.DataFrame | Panel) -> dict[Hashable, dict[str, str]]:
        """The utility tables with choice labels matched to the data's (see :meth:`build_model`).

        For :func:`orthoccp.estimate_discrete`, which takes the utility directly.
        """
        return self._matched_utility(data)

    def discrete_options(self, data: pd.DataFrame | Panel) -> dict[str, Any]:
        """Keyword arguments for :func:`orthoccp.estimate_discrete` besides panel and utility.

        ``estimator``, ``discount``, the ``[estimator]`` options that are set (the
        ``reset_choices`` labels matched to ``data``'s choices), and ``seed``, ``cov`` and
        ``small_sample`` from ``[first_stage]`` and ``[inference]``.
        """
        est = self.estimator
        if not est.discrete:
            raise SpecError(
                f"{_where(self.source)}estimator.method is 'orthogonal'; discrete_options "
                f"applies to 'npl' and 'pml'.",
                key="estimator.method",
            )
        out: dict[str, Any] = {"estimator": est.method, "discount": self.model.discount}
        for key in ("values", "transitions", "smoothing", "n_states", "steps", "max_iterations",
                    "tol", "n_paths", "horizon", "initial_ccp", "sieve_degree"):
            value = getattr(est, key)
            if value is not None:
                out[key] = value
        if est.reset_choices is not None:
            _, observed, integer_labels = self._observed(data)
            out["reset_choices"] = tuple(
                self._match_choice("estimator.reset_choices", c, observed, integer_labels)
                for c in est.reset_choices
            )
        for key, value in (("seed", self.first_stage.seed), ("cov", self.inference.cov),
                           ("small_sample", self.inference.small_sample)):
            if value is not None:
                out[key] = value
        return out

    def _observed(self, data: pd.DataFrame | Panel) -> tuple[pd.DataFrame, list[Any], bool]:
        """The frame, the observed choice labels, and whether they are integers."""
        if isinstance(data, Panel):
            frame = data.frame
            observed = list(data.choices)
            integer_labels = all(isinstance(c, int) and not isinstance(c, bool) for c in observed)
        else:
            frame = data
            self._require_column(frame, "data.choice", self.data.choice)
            col = frame[self.data.choice]
            integer_labels = ptypes.is_integer_dtype(col) and not ptypes.is_bool_dtype(col)
            observed = [_plain(v) for v in pd.unique(col.dropna())]
        return frame, observed, integer_labels

    def _matched_utility(self, data: pd.DataFrame | Panel) -> dict[Hashable, dict[str, str]]:
        frame, observed, integer_labels = self._observed(data)
        utility: dict[Hashable, dict[str, str]] = {}
        for label, params in self.utility.items():
            key = f"utility.{_toml_key(label)}"
            matched = self._match_choice(key, label, observed, integer_labels)
            for name, column in params.items():
                if column != CONSTANT:
                    self._require_column(frame, f"{key}.{_toml_key(name)}", column)
            utility[matched] = dict(params)
        return utility

    def _require_column(self, frame: pd.DataFrame, key: str, name: str) -> None:
        if name not in frame.columns:
            raise SpecError(
                f"{_where(self.source)}{key}: column {name!r} is not in the data; available "
                f"columns: {_list_columns(frame.columns)}.",
                key=key,
            )

    def _match_choice(
        self, key: str, label: str | int, observed: Sequence[Any], integer_labels: bool
    ) -> Any:
        if integer_labels:
            try:
                wanted: Any = int(str(label).strip())
            except ValueError:
                wanted = None
            if wanted is not None and wanted in observed:
                return wanted
        for value in observed:
            if str(value) == str(label):
                return value
        shown = ", ".join(repr(v) for v in sorted(observed, key=str))
        kind = "integer " if integer_labels else ""
        raise SpecError(
            f"{_where(self.source)}{key}: choice {label!r} is not among the {kind}choices "
            f"observed in column {self.data.choice!r} ({shown}).",
            key=key,
        )

    # ------------------------------------------------------------------ output
    def to_dict(self, *, relative_to: str | os.PathLike[str] | None = None) -> dict[str, Any]:
        """The spec as nested plain Python values (the shape :func:`parse_spec` reads).

        Parameters
        ----------
        relative_to : path-like, optional
            Folder the data path is written relative to (the folder of the spec file it is
            written to); absolute when omitted.

        Returns
        -------
        dict
        """
        data: dict[str, Any] = {
            "unit": self.data.unit,
            "period": self.data.period,
            "choice": self.data.choice,
            "states": list(self.data.states),
        }
        if self.data.path is not None:
            data["path"] = _relative_path(self.data.path, relative_to)
        if self.data.missing != "error":
            data["missing"] = self.data.missing
        model: dict[str, Any] = {
            k: v
            for k, v in (("kind", self.model.kind), ("anchor", self.model.anchor),
                         ("discount", self.model.discount))
            if v is not None
        }
        if self.model.persistent:
            model["persistent"] = list(self.model.persistent)
        first_stage = {
            k: v for k, v in dataclasses.asdict(self.first_stage).items() if v is not None
        }
        return {
            "data": data,
            "model": model,
            "utility": {label: dict(params) for label, params in self.utility.items()},
            "first_stage": first_stage,
            "inference": {
                k: v for k, v in dataclasses.asdict(self.inference).items() if v is not None
            },
            **(
                {"estimator": {
                    k: (list(v) if isinstance(v, tuple) else v)
                    for k, v in dataclasses.asdict(self.estimator).items() if v is not None
                }}
                if self.estimator.discrete
                else {}
            ),
        }


# --------------------------------------------------------------------------- parsing
_TOP_KEYS = ("data", "model", "utility", "first_stage", "inference", "estimator")
_DATA_KEYS = ("unit", "period", "choice", "states", "path", "missing")
_MODEL_KEYS = ("kind", "anchor", "discount", "persistent")
_FIRST_STAGE_KEYS = ("learner", "regressor", "folds", "seed", "splits", "scheme", "clip",
                     "model_ccp_steps")
_INFERENCE_KEYS = ("cov", "small_sample", "debias", "moments")
_ESTIMATOR_KEYS = (
    "method", "values", "transitions", "smoothing", "reset_choices", "n_states", "steps",
    "max_iterations", "tol", "n_paths", "horizon", "initial_ccp", "sieve_degree",
)
# Options of the orthogonal estimator that the discrete-state estimators do not use.
_ORTHOGONAL_ONLY = (
    "first_stage.learner", "first_stage.regressor", "first_stage.folds", "first_stage.splits",
    "first_stage.scheme", "first_stage.clip", "first_stage.model_ccp_steps", "inference.debias",
    "inference.moments", "model.persistent",
)


def _where(source: Path | None) -> str:
    return f"{source}: " if source is not None else ""


def _type_name(value: Any) -> str:
    """The TOML name of a parsed value's type."""
    if isinstance(value, bool):
        return "boolean"
    if isinstance(value, int):
        return "integer"
    if isinstance(value, float):
        return "float"
    if isinstance(value, str):
        return "string"
    if isinstance(value, (list, tuple)):
        return "array"
    if isinstance(value, Mapping):
        return "table"
    return type(value).__name__


def _show(value: Any) -> str:
    text = repr(value)
    if len(text) > 60:
        text = text[:57] + "..."
    return f"{text} ({_type_name(value)})"


def _list_columns(columns: Iterable[Any], limit: int = 12) -> str:
    cols = [str(c) for c in columns]
    more = f", ... ({len(cols) - limit} more)" if len(cols) > limit else ""
    return ", ".join(cols[:limit]) + more


class _Checker:
    """Type and range checks whose errors name the file and the dotted key."""

    def __init__(self, source: Path | None) -> None:
        self.source = source

    def fail(self, key: str, message: str) -> SpecError:
        return SpecError(f"{_where(self.source)}{message}", key=key)

    def table(self, key: str, value: Any) -> Mapping[str, Any]:
        if not isinstance(value, Mapping):
            raise self.fail(key, f"{key} must be a table, got {_show(value)}.")
        return value

    def keys(self, key: str, table: Mapping[str, Any], valid: Sequence[str]) -> None:
        unknown = [k for k in table if k not in valid]
        if not unknown:
            return
        if not key:
            raise self.fail(
                unknown[0],
                f"unknown table or key {unknown[0]!r} at the top level; valid tables: "
                f"{', '.join(valid)}.",
            )
        raise self.fail(
            f"{key}.{unknown[0]}",
            f"unknown key {unknown[0]!r} in [{key}]; valid keys: {', '.join(valid)}.",
        )

    def required(self, key: str, table: Mapping[str, Any], name: str, what: str) -> Any:
        if name not in table:
            raise self.fail(f"{key}.{name}", f"missing required key {key}.{name} ({what}).")
        return table[name]

    def string(self, key: str, value: Any) -> str:
        if not isinstance(value, str):
            raise self.fail(key, f"{key} must be a string, got {_show(value)}.")
        if not value:
            raise self.fail(key, f"{key} must not be empty.")
        return value

    def strings(self, key: str, value: Any, *, allow_empty: bool) -> tuple[str, ...]:
        if not isinstance(value, (list, tuple)):
            raise self.fail(key, f"{key} must be an array of strings, got {_show(value)}.")
        for item in value:
            if not isinstance(item, str) or not item:
                raise self.fail(
                    key, f"{key} must be an array of non-empty strings; element {_show(item)}."
                )
        if not value and not allow_empty:
            raise self.fail(key, f"{key} must name at least one column, got [].")
        dup = [v for v in value if list(value).count(v) > 1]
        if dup:
            raise self.fail(key, f"{key} lists {dup[0]!r} twice.")
        return tuple(value)

    def integer(self, key: str, value: Any, *, minimum: int) -> int:
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
            raise self.fail(key, f"{key} must be an integer >= {minimum}, got {_show(value)}.")
        if value < minimum:
            raise self.fail(key, f"{key} must be an integer >= {minimum}, got {value!r}.")
        return int(value)

    def number(self, key: str, value: Any) -> float:
        if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
            raise self.fail(key, f"{key} must be a number, got {_show(value)}.")
        out = float(value)
        if not math.isfinite(out):
            raise self.fail(key, f"{key} must be a finite number, got {value!r}.")
        return out

    def boolean(self, key: str, value: Any) -> bool:
        if not isinstance(value, (bool, np.bool_)):
            raise self.fail(key, f"{key} must be true or false, got {_show(value)}.")
        return bool(value)

    def choice(self, key: str, value: Any, valid: Sequence[str]) -> str:
        text = self.string(key, value)
        if text not in valid:
            raise self.fail(
                key,
                f"{key} must be one of {', '.join(repr(v) for v in valid)}, got {text!r}.",
            )
        return text

    def label(self, key: str, value: Any) -> str | int:
        if isinstance(value, bool) or not isinstance(value, (str, int)):
            raise self.fail(
                key, f"{key} must be a choice label (string or integer), got {_show(value)}."
            )
        if isinstance(value, str) and not value:
            raise self.fail(key, f"{key} must not be empty.")
        return value


def parse_spec(
    document: Mapping[str, Any],
    *,
    base_dir: str | os.PathLike[str] | None = None,
    source: str | os.PathLike[str] | None = None,
) -> Spec:
    """Validate a parsed spec document (nested mappings, as from :mod:`tomllib`).

    Parameters
    ----------
    document : Mapping
        The spec's tables.
    base_dir : path-like, optional
        Folder that a relative ``data.path`` is resolved against; the working directory
        when omitted.
    source : path-like, optional
        File name used in error messages and kept as :attr:`Spec.source`.

    Returns
    -------
    Spec

    Raises
    ------
    SpecError
        For an unknown or missing key, a wrong type or an out-of-range value; the message
        names the key, the expected type and the value, and lists valid keys or values.
    """
    src = Path(source) if source is not None else None
    chk = _Checker(src)
    doc = chk.table("spec", document)
    chk.keys("", doc, _TOP_KEYS)
    for name in ("data", "model", "utility"):
        if name not in doc:
            raise chk.fail(name, f"missing required table [{name}].")

    # [data]
    data = chk.table("data", doc["data"])
    chk.keys("data", data, _DATA_KEYS)
    unit = chk.string("data.unit", chk.required("data", data, "unit", "the unit column"))
    period = chk.string("data.period", chk.required("data", data, "period", "the period column"))
    choice = chk.string("data.choice", chk.required("data", data, "choice", "the choice column"))
    states = chk.strings(
        "data.states", chk.required("data", data, "states", "the state columns"), allow_empty=False
    )
    roles = {unit: "data.unit", period: "data.period", choice: "data.choice"}
    if len(roles) < 3:
        raise chk.fail(
            "data", "data.unit, data.period and data.choice must name three different columns."
        )
    for s in states:
        if s in roles:
            raise chk.fail("data.states", f"data.states lists {s!r}, which is already {roles[s]}.")
    path: Path | None = None
    if "path" in data:
        raw_path = Path(chk.string("data.path", data["path"])).expanduser()
        if not raw_path.is_absolute():
            base = Path(base_dir) if base_dir is not None else Path.cwd()
            raw_path = base / raw_path
        path = raw_path
    missing = chk.choice("data.missing", data.get("missing", "error"), MISSING)

    estimator = _parse_estimator(chk, doc.get("estimator", {}))

    # [model]
    model = chk.table("model", doc["model"])
    chk.keys("model", model, _MODEL_KEYS)
    kind: str | None = None
    anchor: str | int | None = None
    if not estimator.discrete or "kind" in model:
        kind = chk.choice(
            "model.kind", chk.required("model", model, "kind", "'renewal' or 'terminal'"), KINDS
        )
    if not estimator.discrete or "anchor" in model:
        anchor = chk.label(
            "model.anchor", chk.required("model", model, "anchor", "the anchor choice")
        )
    discount = chk.number(
        "model.discount", chk.required("model", model, "discount", "a number in [0, 1)")
    )
    if not 0.0 <= discount < 1.0:
        raise chk.fail(
            "model.discount",
            f"model.discount must be in [0, 1) (the infinite-horizon model needs a discount "
            f"below 1; 0 gives a static logit), got {model['discount']!r}.",
        )
    persistent = chk.strings("model.persistent", model.get("persistent", []), allow_empty=True)
    for s in persistent:
        if s not in states:
            raise chk.fail(
                "model.persistent",
                f"model.persistent lists {s!r}, which is not one of data.states.",
            )

    # [utility.<choice>]
    utility_doc = chk.table("utility", doc["utility"])
    if not utility_doc:
        raise chk.fail("utility", "[utility] is empty; add a table [utility.<choice>] per choice.")
    utility: dict[str, Mapping[str, str]] = {}
    for label, params in utility_doc.items():
        key = f"utility.{_toml_key(label)}"
        if not isinstance(params, Mapping):
            raise chk.fail(
                key,
                f"{key} must be a table of parameter = column (\"1\" for a constant), got "
                f"{_show(params)}; write it as [{key}].",
            )
        table: dict[str, str] = {}
        for name, column in params.items():
            pkey = f"{key}.{_toml_key(name)}"
            if isinstance(column, Mapping):
                raise chk.fail(
                    pkey,
                    f"{pkey} must be a column name (string), got a table; nest one level only.",
                )
            table[name] = chk.string(pkey, column)
        utility[str(label)] = MappingProxyType(table)
    if not any(utility.values()):
        raise chk.fail("utility", "the [utility.<choice>] tables declare no parameters.")

    # [first_stage]
    fs_doc = chk.table("first_stage", doc.get("first_stage", {}))
    chk.keys("first_stage", fs_doc, _FIRST_STAGE_KEYS)
    learners = learner_names()

    def fs(name: str, check: Callable[[str, Any], Any]) -> Any:
        value = fs_doc.get(name)
        return None if value is None else check(f"first_stage.{name}", value)

    first_stage = FirstStageSpec(
        learner=fs("learner", lambda k, v: chk.choice(k, v, learners)),
        regressor=fs("regressor", lambda k, v: chk.choice(k, v, learners)),
        folds=fs("folds", lambda k, v: chk.integer(k, v, minimum=2)),
        seed=fs("seed", lambda k, v: chk.integer(k, v, minimum=0)),
        splits=fs("splits", lambda k, v: chk.integer(k, v, minimum=1)),
        scheme=fs("scheme", lambda k, v: chk.choice(k, v, SCHEMES)),
        clip=fs("clip", chk.number),
        model_ccp_steps=fs("model_ccp_steps", lambda k, v: chk.integer(k, v, minimum=0)),
    )
    if first_stage.clip is not None and not 0.0 < first_stage.clip < 0.5:
        raise chk.fail(
            "first_stage.clip",
            f"first_stage.clip must be a probability in (0, 0.5), got {fs_doc['clip']!r}.",
        )

    # [inference]
    inf_doc = chk.table("inference", doc.get("inference", {}))
    chk.keys("inference", inf_doc, _INFERENCE_KEYS)

    def inf(name: str, check: Callable[[str, Any], Any]) -> Any:
        value = inf_doc.get(name)
        return None if value is None else check(f"inference.{name}", value)

    inference = InferenceSpec(
        cov=inf("cov", lambda k, v: chk.choice(k, v, covariance_names())),
        small_sample=inf("small_sample", chk.boolean),
        debias=inf("debias", chk.boolean),
        moments=inf("moments", lambda k, v: chk.choice(k, v, MOMENTS)),
    )

    if estimator.discrete:
        tables = {"first_stage": fs_doc, "inference": inf_doc, "model": model}
        for dotted in _ORTHOGONAL_ONLY:
            section, key = dotted.split(".")
            if key in tables[section]:
                raise chk.fail(
                    dotted,
                    f"{dotted} does not apply with estimator.method = {estimator.method!r} (the "
                    f"discrete-state estimators fit no learner and use no anchor); remove it, "
                    f"or set estimator.method = \"orthogonal\".",
                )
    return Spec(
        data=DataSpec(
            unit=unit, period=period, choice=choice, states=states, path=path, missing=missing
        ),
        model=ModelSpec(kind=kind, anchor=anchor, discount=discount, persistent=persistent),
        utility=MappingProxyType(utility),
        first_stage=first_stage,
        inference=inference,
        source=src,
        estimator=estimator,
    )


def _parse_estimator(chk: _Checker, value: Any) -> EstimatorSpec:
    est_doc = chk.table("estimator", value)
    chk.keys("estimator", est_doc, _ESTIMATOR_KEYS)
    method = chk.choice("estimator.method", est_doc.get("method", "orthogonal"), METHODS)
    if method == "orthogonal":
        extra = [k for k in est_doc if k != "method"]
        if extra:
            raise chk.fail(
                f"estimator.{extra[0]}",
                f"estimator.{extra[0]} applies to the discrete-state estimators only; set "
                f"estimator.method = \"npl\" or \"pml\", or remove it.",
            )
        return EstimatorSpec()

    def opt(name: str, check: Callable[[str, Any], Any]) -> Any:
        v = est_doc.get(name)
        return None if v is None else check(f"estimator.{name}", v)

    def positive(k: str, v: Any) -> float:
        x = chk.number(k, v)
        if not x > 0:
            raise chk.fail(k, f"{k} must be a number > 0, got {v!r}.")
        return x

    def non_negative(k: str, v: Any) -> float:
        x = chk.number(k, v)
        if not x >= 0:
            raise chk.fail(k, f"{k} must be a number >= 0, got {v!r}.")
        return x

    return EstimatorSpec(
        method=method,
        values=opt("values", lambda k, v: chk.choice(k, v, VALUES)),
        transitions=opt("transitions", lambda k, v: chk.choice(k, v, TRANSITIONS)),
        smoothing=opt("smoothing", non_negative),
        reset_choices=opt("reset_choices", lambda k, v: chk.strings(k, v, allow_empty=True)),
        n_states=opt("n_states", lambda k, v: chk.integer(k, v, minimum=1)),
        steps=opt("steps", lambda k, v: chk.integer(k, v, minimum=1)),
        max_iterations=opt("max_iterations", lambda k, v: chk.integer(k, v, minimum=1)),
        tol=opt("tol", positive),
        n_paths=opt("n_paths", lambda k, v: chk.integer(k, v, minimum=1)),
        horizon=opt("horizon", lambda k, v: chk.integer(k, v, minimum=1)),
        initial_ccp=opt("initial_ccp", lambda k, v: chk.choice(k, v, INITIAL_CCPS)),
        sieve_degree=opt("sieve_degree", lambda k, v: chk.integer(k, v, minimum=1)),
    )


def read_spec(path: str | os.PathLike[str]) -> Spec:
    """Read and validate a TOML spec file.

    Parameters
    ----------
    path : path-like
        The spec file. A relative ``data.path`` inside it is resolved against its folder.

    Returns
    -------
    Spec

    Raises
    ------
    FileNotFoundError
        When the file does not exist.
    SpecError
        When the file is not valid TOML or fails validation (see :func:`parse_spec`).
    """
    p = Path(path)
    if not p.is_file():
        if p.is_dir():
            raise SpecError(f"spec file {str(p)!r} is a folder, not a TOML file.", key=None)
        raise FileNotFoundError(2, "spec file not found", str(p))
    try:
        with p.open("rb") as fh:
            document = tomllib.load(fh)
    except tomllib.TOMLDecodeError as exc:
        raise SpecError(f"{p}: not valid TOML: {exc}.") from exc
    except UnicodeDecodeError as exc:
        raise SpecError(f"{p}: not valid TOML: the file is not UTF-8 text ({exc.reason}).") from exc
    return parse_spec(document, base_dir=p.parent, source=p)


# --------------------------------------------------------------------------- writing TOML
_WIDTH = 88
_BARE_KEY = re.compile(r"[A-Za-z0-9_-]+")
_ESCAPES = {
    '"': '\\"',
    "\\": "\\\\",
    "\b": "\\b",
    "\t": "\\t",
    "\n": "\\n",
    "\f": "\\f",
    "\r": "\\r",
}


def _toml_string(text: str) -> str:
    out = []
    for ch in text:
        if ch in _ESCAPES:
            out.append(_ESCAPES[ch])
        elif ord(ch) < 0x20 or ord(ch) == 0x7F:
            out.append(f"\\u{ord(ch):04x}")
        else:
            out.append(ch)
    return '"' + "".join(out) + '"'


def _toml_key(key: Any) -> str:
    text = str(key)
    return text if _BARE_KEY.fullmatch(text) else _toml_string(text)


def _toml_value(value: Any, where: str) -> str:
    if isinstance(value, (bool, np.bool_)):
        return "true" if value else "false"
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        x = float(value)
        if not math.isfinite(x):
            raise ValueError(f"{where}: cannot write the non-finite number {x!r} to a spec file.")
        return repr(x)
    if isinstance(value, str):
        return _toml_string(value)
    if isinstance(value, os.PathLike):
        return _toml_string(Path(value).as_posix())
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(v, where) for v in value) + "]"
    raise TypeError(f"{where}: cannot write a value of type {type(value).__name__} to TOML.")


def _emit_table(lines: list[str], name: tuple[str, ...], table: Mapping[Any, Any]) -> None:
    scalars = [(k, v) for k, v in table.items() if not isinstance(v, Mapping) and v is not None]
    tables = [(k, v) for k, v in table.items() if isinstance(v, Mapping)]
    # A table with only sub-tables needs no header of its own; an empty one does.
    if name and (scalars or not tables):
        if lines:
            lines.append("")
        lines.append("[" + ".".join(name) + "]")
    for key, value in scalars:
        dotted = ".".join((*name, str(key)))
        line = f"{_toml_key(key)} = {_toml_value(value, dotted)}"
        if len(line) > _WIDTH and isinstance(value, (list, tuple)) and value:
            lines.append(f"{_toml_key(key)} = [")
            items = [_toml_value(v, dotted) for v in value]
            row = "   "
            for item in items:
                if len(row) + len(item) + 2 > _WIDTH and row.strip():
                    lines.append(row.rstrip())
                    row = "   "
                row += f" {item},"
            lines.append(row.rstrip())
            lines.append("]")
        else:
            lines.append(line)
    for key, sub in tables:
        _emit_table(lines, (*name, _toml_key(key)), sub)


def dumps_toml(document: Mapping[str, Any], *, header: str | None = None) -> str:
    """Serialise nested mappings of TOML values (no arrays of tables) to TOML text.

    Parameters
    ----------
    document : Mapping
        Tables are mappings; values are strings, booleans, integers, finite floats, paths
        or arrays of those. ``None`` values are left out (TOML has no null).
    header : str, optional
        Comment written at the top, one ``#`` line per line of text.

    Returns
    -------
    str
    """
    lines: list[str] = []
    if header:
        lines.extend(f"# {line}".rstrip() for line in header.splitlines())
    body: list[str] = []
    _emit_table(body, (), document)
    if lines and body:
        lines.append("")
    lines.extend(body)
    return "\n".join(lines) + "\n"


def write_spec(
    path: str | os.PathLike[str],
    spec: Mapping[str, Any] | Spec,
    *,
    header: str | None = None,
) -> Path:
    """Write a spec file.

    Parameters
    ----------
    path : path-like
        Destination (``.toml``); its folder is created when missing.
    spec : Mapping or Spec
        Nested mapping with the tables of a spec file, or a :class:`Spec` (its data path is
        written relative to the destination's folder).
    header : str, optional
        Comment written at the top of the file.

    Returns
    -------
    pathlib.Path
        The written file.
    """
    p = Path(path)
    document = spec.to_dict(relative_to=p.parent) if isinstance(spec, Spec) else spec
    text = dumps_toml(document, header=header)
    p.parent.mkdir(parents=True, exist_ok=True)
    p.write_text(text, encoding="utf-8")
    return p


def _relative_path(path: Path, folder: str | os.PathLike[str] | None) -> str:
    if folder is None:
        return Path(path).absolute().as_posix()
    try:
        return Path(os.path.relpath(Path(path).absolute(), Path(folder).absolute())).as_posix()
    except ValueError:  # different drives on Windows
        return Path(path).absolute().as_posix()


# --------------------------------------------------------------------------- data files
def data_format(path: str | os.PathLike[str], *, writing: bool = False) -> str:
    """The format of a data file, from its extension, checked to be readable or writable.

    Parameters
    ----------
    path : path-like
        Data file name.
    writing : bool, default=False
        Word the pyarrow message for writing rather than reading.

    Returns
    -------
    {"csv", "parquet"}

    Raises
    ------
    orthoccp.InputError
        For an unsupported extension, or a Parquet file when pyarrow is not installed.
    """
    p = Path(path)
    name = p.name.lower()
    if name.endswith(CSV_SUFFIXES):
        return "csv"
    if name.endswith(PARQUET_SUFFIXES):
        if importlib.util.find_spec("pyarrow") is None:
            action = "writing" if writing else "reading"
            raise InputError(
                f"{action} the Parquet file {str(p)!r} needs pyarrow, which is not installed; "
                f"install it with 'pip install pyarrow' (or 'pip install orthoccp[parquet]'), "
                f"or use a .csv file."
            )
        return "parquet"
    suffix = "".join(p.suffixes) or "(none)"
    raise InputError(
        f"data file {str(p)!r} has an unsupported extension {suffix!r}; use .csv or .parquet."
    )


def data_stem(path: str | os.PathLike[str]) -> Path:
    """``path`` without its data extension (``panel.csv.gz`` -> ``panel``)."""
    p = Path(path)
    name = p.name
    for suffix in sorted(CSV_SUFFIXES + PARQUET_SUFFIXES, key=len, reverse=True):
        if name.lower().endswith(suffix):
            return p.with_name(name[: -len(suffix)])
    return p.with_suffix("")


def read_data(path: str | os.PathLike[str]) -> pd.DataFrame:
    """Read a panel file: CSV (optionally compressed) by pandas, Parquet by pandas + pyarrow.

    Parameters
    ----------
    path : path-like
        ``.csv`` (also ``.csv.gz`` etc.) or ``.parquet`` / ``.pq``.

    Returns
    -------
    pandas.DataFrame

    Raises
    ------
    FileNotFoundError
        When the file does not exist.
    orthoccp.InputError
        For an unsupported extension, a missing pyarrow, or a file pandas cannot parse.
    """
    p = Path(path)
    fmt = data_format(p)
    if not p.is_file():
        if p.is_dir():
            raise InputError(f"data file {str(p)!r} is a folder, not a file.")
        raise FileNotFoundError(2, "data file not found", str(p))
    if fmt == "parquet":
        try:
            return pd.read_parquet(p, engine="pyarrow")
        except (OSError, ValueError) as exc:
            raise InputError(f"could not read Parquet file {str(p)!r}: {exc}") from exc
    try:
        return pd.read_csv(p)
    except pd.errors.EmptyDataError as exc:
        raise InputError(f"data file {str(p)!r} is empty (no columns to read).") from exc
    except pd.errors.ParserError as exc:
        raise InputError(f"could not parse CSV file {str(p)!r}: {exc}") from exc
    except UnicodeDecodeError as exc:
        raise InputError(
            f"could not read CSV file {str(p)!r}: not UTF-8 text ({exc.reason})."
        ) from exc


def write_data(frame: pd.DataFrame, path: str | os.PathLike[str]) -> Path:
    """Write a panel file, CSV or Parquet by extension (see :func:`read_data`).

    Parameters
    ----------
    frame : pandas.DataFrame
        The data; the index is not written.
    path : path-like
        Destination; its folder is created when missing.

    Returns
    -------
    pathlib.Path
        The written file.
    """
    p = Path(path)
    fmt = data_format(p, writing=True)
    p.parent.mkdir(parents=True, exist_ok=True)
    if fmt == "parquet":
        frame.to_parquet(p, engine="pyarrow", index=False)
    else:
        frame.to_csv(p, index=False)
    return p


def _plain(value: Any) -> Any:
    """NumPy scalars to Python scalars."""
    return value.item() if isinstance(value, np.generic) else value
