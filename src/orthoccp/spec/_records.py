"""Spec records: the frozen dataclasses of a parsed spec and their views."""

from __future__ import annotations

import dataclasses
import os
from collections.abc import Hashable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from pandas.api import types as ptypes

from .._errors import InputError
from .._labels import check_declared, match_label, plain_label, show_label
from ..data import Panel, missing_column_hint
from ..model import CONSTANT, Model
from ._check import SpecError, _Checker, _where
from ._data import read_data
from ._toml import _relative_path, _toml_key


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
    correction_weights : {"solution", "plugin"} or None
        Where the corrections' weights are evaluated (default ``"solution"``; see
        :func:`orthoccp.estimate`).
    """

    cov: str | None = None
    small_sample: bool | None = None
    debias: bool | None = None
    moments: str | None = None
    correction_weights: str | None = None


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
    >>> from orthoccp.spec import parse_spec
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
            fs = dataclasses.replace(fs, learner=chk.option("--learner", "learner", learner))
        if folds is not None:
            fs = dataclasses.replace(fs, folds=chk.option("--folds", "folds", folds))
        if seed is not None:
            fs = dataclasses.replace(fs, seed=chk.option("--seed", "seed", seed))
        inf = self.inference
        if debias is not None:
            inf = dataclasses.replace(inf, debias=chk.option("debias", "debias", debias))
        return dataclasses.replace(self, first_stage=fs, inference=inf)

    def estimate_options(self) -> dict[str, Any]:
        """Keyword arguments for :func:`orthoccp.estimate` (everything but panel and model).

        Returns
        -------
        dict
            The options the spec sets, among ``learner, regressor, folds, seed, splits,
            scheme, clip, model_ccp_steps, cov, small_sample, debias, moments,
            correction_weights``; options it
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
        ``"1"``) match the numeric label ``1`` or ``1.0``; text labels match exactly (the
        package's one label matcher). Every observed choice needs a ``[utility.<choice>]``
        table (empty for a choice without parameters).

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
        _, observed, counts = self._observed(data)
        anchor = observed[self._match_choice("model.anchor", self.model.anchor, observed, counts)]
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
            _, observed, counts = self._observed(data)
            out["reset_choices"] = tuple(
                observed[self._match_choice("estimator.reset_choices", c, observed, counts)]
                for c in est.reset_choices
            )
        for key, value in (("seed", self.first_stage.seed), ("cov", self.inference.cov),
                           ("small_sample", self.inference.small_sample)):
            if value is not None:
                out[key] = value
        return out

    def _observed(self, data: pd.DataFrame | Panel) -> tuple[pd.DataFrame, list[Any], np.ndarray]:
        """The frame, the observed choice labels and their row counts."""
        if isinstance(data, Panel):
            frame = data.frame
            observed = list(data.choices)
            counts = np.bincount(data.choice_codes, minlength=len(observed))
        else:
            frame = data
            self._require_column(frame, "data.choice", self.data.choice)
            tally = frame[self.data.choice].value_counts(dropna=True, sort=False)
            try:
                tally = tally.sort_index()  # listed in order, as the panel lists its choices
            except TypeError:
                pass
            observed = [plain_label(v) for v in tally.index]
            counts = tally.to_numpy()
        return frame, observed, counts

    def _matched_utility(self, data: pd.DataFrame | Panel) -> dict[Hashable, dict[str, str]]:
        frame, observed, counts = self._observed(data)
        utility: dict[Hashable, dict[str, str]] = {}
        claimed: dict[int, str] = {}
        for label, params in self.utility.items():
            key = f"utility.{_toml_key(label)}"
            k = self._match_choice(key, label, observed, counts)
            if k in claimed:
                raise SpecError(
                    f"{_where(self.source)}{key}: two keys for the same choice: [{claimed[k]}] "
                    f"and [{key}] both name {show_label(observed[k])}; keep one of them.",
                    key=key,
                )
            claimed[k] = key
            for name, column in params.items():
                if column != CONSTANT:
                    self._require_column(frame, f"{key}.{_toml_key(name)}", column)
            utility[observed[k]] = dict(params)
        try:
            check_declared(claimed, observed, counts, column=self.data.choice,
                           fix=lambda label: f"add an empty table [utility.{_toml_key(label)}]")
        except InputError as exc:
            raise SpecError(f"{_where(self.source)}utility: {exc}", key="utility") from None
        return utility

    def _require_column(self, frame: pd.DataFrame, key: str, name: str) -> None:
        if name not in frame.columns:
            raise SpecError(
                f"{_where(self.source)}{key}: column {name!r} is not in the data; "
                f"{missing_column_hint(name, frame.columns)}",
                key=key,
            )

    def _match_choice(self, key: str, label: str | int, observed: Sequence[Any],
                      counts: np.ndarray) -> int:
        try:
            return match_label(label, observed, role="choice", column=self.data.choice,
                               counts=counts)
        except InputError as exc:
            raise SpecError(f"{_where(self.source)}{key}: {exc}", key=key) from None

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
