"""Finite state spaces: state codes per row, per-state utility design, binning helper.

The discrete estimators work on a state space of S points. :func:`state_space` codes every
row of a :class:`~orthoccp.Panel` to one of them (the distinct combinations of the panel's
state columns, or given integer codes 0..S-1), and :func:`utility_design` builds the
flow-utility design :math:`Z` (S x J x p), :math:`u_j(s) = Z_j(s)'\\theta`, from the same
utility specification as :class:`~orthoccp.Model`. :func:`bin_states` discretises continuous
state columns first.
"""

from __future__ import annotations

from collections.abc import Hashable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
import pandas as pd

from .._arrays import label_index
from .._errors import InputError
from .._labels import check_declared, declare_in_python, match_keys, plain_label, show_label
from ..data import Panel, as_float
from ..model import CONSTANT, check_constant_name

__all__ = ["StateSpace", "bin_states", "state_space", "utility_design"]


@dataclass(frozen=True, eq=False)
class StateSpace:
    """The finite state space of a panel and each row's state.

    Attributes
    ----------
    codes : numpy.ndarray
        (n_rows,) state index 0..S-1 of each panel row (panel order).
    values : pandas.DataFrame
        (S, n_state_columns) the state columns' values at each state.
    n_states : int
        S.
    coding : str
        ``"combinations"`` (distinct observed combinations of the state columns, sorted) or
        ``"given"`` (one column of integer codes 0..S-1; states may be unobserved).
    """

    codes: np.ndarray
    values: pd.DataFrame
    n_states: int
    coding: str

    @property
    def observed(self) -> np.ndarray:
        """(S,) True for states that some row occupies."""
        return np.bincount(self.codes, minlength=self.n_states) > 0


def state_space(panel: Panel, *, n_states: int | None = None) -> StateSpace:
    """Code each row of ``panel`` to a point of a finite state space.

    Parameters
    ----------
    panel : Panel
        The data; its ``states`` columns define the state.
    n_states : int, optional
        If given, the panel must have exactly one state column holding integer codes
        0..n_states-1 (states that no row occupies are allowed: the model is solved on all
        of them). By default the states are the distinct observed combinations of the state
        columns, in sorted order.

    Returns
    -------
    StateSpace

    Examples
    --------
    >>> import pandas as pd
    >>> from orthoccp import Panel
    >>> df = pd.DataFrame({"id": [0, 0, 1], "t": [0, 1, 0], "a": [0, 1, 0],
    ...                    "x": [2, 5, 2], "g": ["u", "u", "v"]})
    >>> sp = state_space(Panel(df, unit="id", period="t", choice="a", states=["x", "g"]))
    >>> sp.n_states, sp.codes.tolist()
    (3, [0, 2, 1])
    """
    if n_states is not None:
        if isinstance(n_states, bool) or not isinstance(n_states, (int, np.integer)) or n_states < 1:
            raise InputError(f"n_states must be a positive integer, got {n_states!r}.")
        if len(panel.states) != 1:
            raise InputError(
                f"n_states= needs exactly one state column of integer codes, got states "
                f"{list(panel.states)}; combine them into one code column, or leave n_states "
                f"unset to use their distinct combinations."
            )
        name = panel.states[0]
        col = panel.frame[name]
        if pd.api.types.is_numeric_dtype(col) and not pd.api.types.is_bool_dtype(col):
            raw = as_float(col)
        else:
            raw = pd.to_numeric(col, errors="coerce").to_numpy(dtype=np.float64)
        if (np.isnan(raw).any() or np.any(raw != np.round(raw)) or raw.min() < 0
                or raw.max() >= n_states):
            raise InputError(
                f"state column {name!r} must hold integer codes 0..{int(n_states) - 1} when "
                f"n_states={n_states}; found values in [{np.nanmin(raw):g}, {np.nanmax(raw):g}]."
            )
        values = pd.DataFrame(np.arange(int(n_states))[:, None], columns=label_index([name]))
        return StateSpace(raw.astype(np.int64), values, int(n_states), "given")
    frame = panel.frame[list(panel.states)]
    codes = frame.groupby(list(panel.states), sort=True, observed=True).ngroup().to_numpy()
    order = np.argsort(codes, kind="stable")
    first = order[np.r_[True, np.diff(codes[order]) > 0]]
    values = frame.iloc[first].reset_index(drop=True)
    return StateSpace(codes.astype(np.int64), values, int(codes.max()) + 1, "combinations")


def utility_design(
    panel: Panel,
    space: StateSpace,
    utility: Mapping[Hashable, Mapping[str, Any]],
    choices: Sequence[Hashable],
) -> tuple[np.ndarray, tuple[str, ...]]:
    """Per-state flow-utility design from a utility specification.

    Parameters
    ----------
    panel : Panel
        The data.
    space : StateSpace
        The coded state space.
    utility : mapping
        Choice label -> {parameter: regressor}. A regressor is ``"1"`` (a constant), the
        name of a data column that is a function of the state (one value per state), or an
        array of S values (one per state, needed for states no row occupies unless the
        column is itself a state column). Every observed choice must be listed, a choice
        with zero flow utility as an empty mapping (see :class:`~orthoccp.Model`).
    choices : sequence
        Choice labels in the order of the J axis.

    Returns
    -------
    Z : numpy.ndarray
        (S, J, p) design, :math:`u_j(s) = \\sum_k \\theta_k Z_{jk}(s)`.
    names : tuple of str
        Parameter names in order of first appearance.
    """
    if not isinstance(utility, Mapping) or not utility:
        raise InputError("utility must map at least one choice to {parameter: regressor}.")
    names: list[str] = []
    for label, spec in utility.items():
        if not isinstance(spec, Mapping):
            raise InputError(
                f"utility[{label!r}] must map parameter names to regressors, got {spec!r}."
            )
        for name in spec:
            if not isinstance(name, str) or not name:
                raise InputError(f"utility[{label!r}] has a bad parameter name {name!r}.")
            if name not in names:
                names.append(name)
    if not names:
        raise InputError("utility declares no parameters.")
    S, J = space.n_states, len(choices)
    Z = np.zeros((S, J, len(names)))
    observed = space.observed
    counts = np.bincount(panel.choice_codes, minlength=J)
    positions = match_keys(utility, choices, role="utility choice", column=panel.choice,
                           counts=counts)
    check_declared(positions.values(), choices, counts, column=panel.choice,
                   fix=declare_in_python)
    for label, spec in utility.items():
        j = positions[label]
        for name, reg in spec.items():
            Z[:, j, names.index(name)] = _regressor(panel, space, reg, label, name, observed)
    return Z, tuple(names)


def _regressor(
    panel: Panel,
    space: StateSpace,
    reg: Any,
    label: Hashable,
    name: str,
    observed: np.ndarray,
) -> np.ndarray:
    S = space.n_states
    where = f"utility[{show_label(label)}][{name!r}]"
    if isinstance(reg, str):
        if reg == CONSTANT:
            check_constant_name(panel.frame.columns, where)
            return np.ones(S)
        if reg in space.values.columns and pd.api.types.is_numeric_dtype(space.values[reg]):
            return space.values[reg].to_numpy(dtype=np.float64)
        col = panel.column(reg)
        total = np.bincount(space.codes, weights=col, minlength=S)
        count = np.bincount(space.codes, minlength=S)
        mean = np.divide(total, count, out=np.zeros(S), where=count > 0)
        spread = np.abs(col - mean[space.codes])
        if spread.max() > 1e-9 * max(1.0, float(np.abs(col).max())):
            raise InputError(
                f"{where}: column {reg!r} varies within a state; a discrete-state model needs "
                f"regressors that are functions of the state. Add the column to the states "
                f"or bin it with bin_states()."
            )
        if not observed.all():
            states = " or ".join(repr(c) for c in space.values.columns)
            raise InputError(
                f"{where}: column {reg!r} gives no value at the {int((~observed).sum())} of "
                f"{S} states that no row occupies. Use a state column itself as the regressor "
                f"({states}, defined at every state; in a spec file: {name} = "
                f"\"{space.values.columns[0]}\" under [utility.{plain_label(label)}]), or, from "
                f"Python, pass an array of {S} values (one per state)."
            )
        return mean
    arr = np.asarray(reg, dtype=np.float64)
    if arr.shape != (S,) or not np.all(np.isfinite(arr)):
        raise InputError(
            f"{where} must be '1', a column name or an array of S = {S} finite values (one "
            f"per state), got shape {arr.shape}."
        )
    return arr


def bin_states(
    frame: pd.DataFrame,
    columns: Sequence[str],
    *,
    bins: int = 10,
    strategy: Literal["quantile", "uniform"] = "quantile",
) -> tuple[pd.DataFrame, dict[str, np.ndarray]]:
    """Discretise continuous state columns into bins (a documented approximation).

    Parameters
    ----------
    frame : pandas.DataFrame
        The data; it is not modified.
    columns : sequence of str
        Numeric columns to bin.
    bins : int, default=10
        Bins per column (fewer when quantiles coincide).
    strategy : {"quantile", "uniform"}, default="quantile"
        Edges at the empirical quantiles (about equally many rows per bin) or equally
        spaced between the minimum and the maximum.

    Returns
    -------
    binned : pandas.DataFrame
        A copy with two new columns per binned column: ``<col>_bin``, the bin index
        0..B-1, and ``<col>_mid``, the mean of the column within the row's bin.
    edges : dict
        Column -> (B+1,) bin edges.

    Notes
    -----
    The discrete estimators then treat ``<col>_bin`` as the state and ``<col>_mid`` as its
    regressor. This changes the model: within a bin the flow utility and the transition
    law are averaged, so the estimates are those of the binned model. More bins reduce
    this approximation error but leave fewer transitions per cell; check that the
    estimates are stable when ``bins`` changes (common practice).

    Examples
    --------
    >>> import pandas as pd
    >>> df = pd.DataFrame({"x": [0.1, 0.4, 0.35, 0.9]})
    >>> out, edges = bin_states(df, ["x"], bins=2)
    >>> out["x_bin"].tolist()
    [0, 1, 0, 1]
    """
    if not isinstance(frame, pd.DataFrame):
        raise InputError(f"frame must be a pandas DataFrame, got {type(frame).__name__}.")
    if isinstance(bins, bool) or not isinstance(bins, (int, np.integer)) or bins < 2:
        raise InputError(f"bins must be an integer >= 2, got {bins!r}.")
    if strategy not in ("quantile", "uniform"):
        raise InputError(f"strategy must be 'quantile' or 'uniform', got {strategy!r}.")
    if isinstance(columns, str):
        columns = [columns]
    out = frame.copy()
    edges: dict[str, np.ndarray] = {}
    for col in columns:
        if col not in frame.columns:
            raise InputError(f"column {col!r} to bin is not in the data.")
        x = pd.to_numeric(frame[col], errors="coerce").to_numpy(dtype=np.float64)
        if not np.all(np.isfinite(x)):
            raise InputError(f"column {col!r} has missing or non-numeric values; drop them first.")
        if strategy == "quantile":
            e = np.unique(np.quantile(x, np.linspace(0.0, 1.0, int(bins) + 1)))
        else:
            e = np.linspace(x.min(), x.max(), int(bins) + 1)
        if e.size < 2:
            e = np.array([x.min(), x.min()])
        code = np.clip(np.searchsorted(e, x, side="right") - 1, 0, max(e.size - 2, 0))
        B = max(e.size - 1, 1)
        mid = np.bincount(code, weights=x, minlength=B) / np.maximum(np.bincount(code, minlength=B), 1)
        out[f"{col}_bin"] = code.astype(np.int64)
        out[f"{col}_mid"] = mid[code]
        edges[col] = e
    return out, edges
