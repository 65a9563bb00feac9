"""Panel data: validation, sorting and the link from each row to its unit's next row.

The data are validated once, here, when they are wrapped. Everything downstream works on
plain NumPy arrays held by :class:`Panel`.
"""

from __future__ import annotations

from collections.abc import Hashable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from pandas.api import types as ptypes

from ._errors import InputError

__all__ = ["Panel"]


def _check_column(frame: pd.DataFrame, name: str, role: str) -> None:
    if not isinstance(name, str):
        raise InputError(f"{role} must be a column name (str), got {name!r}.")
    if name not in frame.columns:
        cols = ", ".join(map(str, list(frame.columns)[:12]))
        more = " ..." if frame.shape[1] > 12 else ""
        raise InputError(
            f"{role} column {name!r} is not in the data. Available columns: {cols}{more}."
        )


def _state_matrix(frame: pd.DataFrame, states: Sequence[str]) -> tuple[np.ndarray, tuple[str, ...]]:
    """Numeric feature matrix for the learners; categorical states become indicator columns."""
    blocks: list[np.ndarray] = []
    names: list[str] = []
    for col in states:
        s = frame[col]
        if isinstance(s.dtype, pd.CategoricalDtype) or ptypes.is_object_dtype(s) or ptypes.is_string_dtype(s):
            if not isinstance(s.dtype, pd.CategoricalDtype):
                # A text column that is really numbers typed as text is a data error.
                converted = pd.to_numeric(s, errors="coerce")
                bad = converted.isna() & s.notna()
                if not bad.any():
                    raise InputError(
                        f"state column {col!r} holds numbers stored as text; convert it with "
                        f"pd.to_numeric before wrapping the panel."
                    )
                if converted.notna().mean() > 0.5:
                    example = s[bad].iloc[0]
                    raise InputError(
                        f"state column {col!r} is mostly numeric but holds text such as "
                        f"{example!r} in {int(bad.sum())} rows; clean it or declare it "
                        f"categorical with .astype('category')."
                    )
            if s.isna().any():
                raise InputError(
                    f"state column {col!r} has {int(s.isna().sum())} missing values; "
                    f"drop or impute those rows before wrapping the panel."
                )
            cat = pd.Categorical(s)
            for level_code, level in enumerate(cat.categories):
                blocks.append((cat.codes == level_code).astype(np.float64)[:, None])
                names.append(f"{col}={level}")
            continue
        if ptypes.is_bool_dtype(s):
            values = s.to_numpy(dtype=np.float64)
        elif ptypes.is_numeric_dtype(s):
            values = s.to_numpy(dtype=np.float64, na_value=np.nan)
        else:
            raise InputError(
                f"state column {col!r} has unsupported dtype {s.dtype}; use numbers, "
                f"booleans or a categorical."
            )
        n_bad = int((~np.isfinite(values)).sum())
        if n_bad:
            raise InputError(
                f"state column {col!r} has {n_bad} missing or infinite values; drop or "
                f"impute those rows before wrapping the panel."
            )
        blocks.append(values[:, None])
        names.append(col)
    if not blocks:
        return np.empty((len(frame), 0)), ()
    return np.hstack(blocks), tuple(names)


@dataclass(frozen=True, eq=False)
class Panel:
    """A validated panel of repeated discrete choices.

    Parameters
    ----------
    frame : pandas.DataFrame
        One row per unit and period.
    unit : str
        Column identifying the decision maker (any hashable labels).
    period : str
        Integer period column. Rows of a unit are linked to the next row only when its period
        is exactly one larger.
    choice : str
        Column of chosen alternatives; labels may be strings or integers.
    states : sequence of str
        Columns the first-stage learners see. Numeric, boolean or categorical; categorical
        states enter the learners as indicator columns.

    Attributes
    ----------
    frame : pandas.DataFrame
        The data sorted by unit and period, with a fresh ``RangeIndex``.
    choices : tuple
        Sorted distinct choice labels; ``choice_codes`` indexes into it.
    unit_codes : numpy.ndarray
        Integer code of each row's unit (0..n_units-1, in sorted unit order).
    next_row : numpy.ndarray
        Index of the unit's row in the next period, or -1 when there is none.
    gap_after : numpy.ndarray
        True where the unit has a later row but its period is not consecutive.

    Examples
    --------
    >>> import pandas as pd
    >>> df = pd.DataFrame({"id": [1, 1, 2], "t": [0, 1, 0], "a": ["k", "s", "k"],
    ...                    "x": [0.1, 0.5, 0.2]})
    >>> p = Panel(df, unit="id", period="t", choice="a", states=["x"])
    >>> p.n_units, p.n_rows, p.next_row.tolist()
    (2, 3, [1, -1, -1])
    """

    frame: pd.DataFrame
    unit: str
    period: str
    choice: str
    states: tuple[str, ...]
    choices: tuple[Any, ...] = field(init=False)
    choice_codes: np.ndarray = field(init=False, repr=False)
    unit_codes: np.ndarray = field(init=False, repr=False)
    unit_labels: np.ndarray = field(init=False, repr=False)
    periods: np.ndarray = field(init=False, repr=False)
    next_row: np.ndarray = field(init=False, repr=False)
    gap_after: np.ndarray = field(init=False, repr=False)
    features: np.ndarray = field(init=False, repr=False)
    feature_names: tuple[str, ...] = field(init=False)
    unit_keys: np.ndarray = field(init=False, repr=False)

    def __init__(
        self,
        frame: pd.DataFrame,
        *,
        unit: str,
        period: str,
        choice: str,
        states: Sequence[str],
    ) -> None:
        if not isinstance(frame, pd.DataFrame):
            raise InputError(f"data must be a pandas DataFrame, got {type(frame).__name__}.")
        if len(frame) == 0:
            raise InputError("data has no rows.")
        if isinstance(states, str):
            states = [states]
        states = tuple(states)
        for name, role in ((unit, "unit"), (period, "period"), (choice, "choice")):
            _check_column(frame, name, role)
        if not states:
            raise InputError("states is empty; name at least one state column.")
        for s in states:
            _check_column(frame, s, "state")
        roles = {unit: "unit", period: "period", choice: "choice"}
        if len(roles) < 3:
            raise InputError("unit, period and choice must be three different columns.")
        for s in states:
            if s in roles:
                raise InputError(f"state {s!r} is also the {roles[s]} column; remove it from states.")
        if len(set(states)) != len(states):
            dup = [s for s in states if states.count(s) > 1][0]
            raise InputError(f"state {dup!r} is listed twice in states.")

        for name in (unit, choice):
            n_missing = int(frame[name].isna().sum())
            if n_missing:
                raise InputError(f"{name!r} column has {n_missing} missing values; drop those rows.")
        per = frame[period]
        if not ptypes.is_numeric_dtype(per) or ptypes.is_bool_dtype(per):
            raise InputError(
                f"period column {period!r} must hold integers, got dtype {per.dtype}."
            )
        per_values = per.to_numpy(dtype=np.float64, na_value=np.nan)
        if not np.all(np.isfinite(per_values)) or np.any(per_values != np.round(per_values)):
            bad = per[~(np.isfinite(per_values) & (per_values == np.round(per_values)))].iloc[0]
            raise InputError(
                f"period column {period!r} must hold whole numbers; found {bad!r}."
            )

        sorted_frame = frame.sort_values([unit, period], kind="mergesort").reset_index(drop=True)
        dup_mask = sorted_frame.duplicated([unit, period], keep=False)
        if dup_mask.any():
            first = sorted_frame.loc[dup_mask, [unit, period]].iloc[0]
            raise InputError(
                f"{int(dup_mask.sum())} rows share a unit and period (e.g. {unit}="
                f"{_plain(first[unit])!r}, {period}={_plain(first[period])!r}); each unit-period "
                f"must appear once."
            )

        unit_labels, unit_codes = np.unique(sorted_frame[unit].to_numpy(), return_inverse=True)
        choice_values = sorted_frame[choice].to_numpy()
        try:
            choices, codes = np.unique(choice_values, return_inverse=True)
        except TypeError as exc:
            raise InputError(
                f"choice column {choice!r} mixes label types (e.g. strings and numbers); "
                f"use one type."
            ) from exc
        periods = sorted_frame[period].to_numpy(dtype=np.int64)
        n = len(sorted_frame)
        same_unit_next = np.zeros(n, dtype=bool)
        same_unit_next[:-1] = unit_codes[1:] == unit_codes[:-1]
        consecutive = np.zeros(n, dtype=bool)
        consecutive[:-1] = periods[1:] == periods[:-1] + 1
        linked = same_unit_next & consecutive
        next_row = np.where(linked, np.arange(n) + 1, -1)
        gap_after = same_unit_next & ~consecutive

        features, feature_names = _state_matrix(sorted_frame, states)
        unit_keys = _unit_keys(sorted_frame[[period, choice, *states]], unit_codes, periods)

        object.__setattr__(self, "frame", sorted_frame)
        object.__setattr__(self, "unit", unit)
        object.__setattr__(self, "period", period)
        object.__setattr__(self, "choice", choice)
        object.__setattr__(self, "states", states)
        object.__setattr__(self, "choices", tuple(_plain(c) for c in choices))
        object.__setattr__(self, "choice_codes", codes.astype(np.int64))
        object.__setattr__(self, "unit_codes", unit_codes.astype(np.int64))
        object.__setattr__(self, "unit_labels", unit_labels)
        object.__setattr__(self, "periods", periods)
        object.__setattr__(self, "next_row", next_row.astype(np.int64))
        object.__setattr__(self, "gap_after", gap_after)
        object.__setattr__(self, "features", features)
        object.__setattr__(self, "feature_names", feature_names)
        object.__setattr__(self, "unit_keys", unit_keys)

    @property
    def canonical_order(self) -> np.ndarray:
        """Row order by (unit key, period): independent of unit labels and input row order.

        Learners are trained on rows in this order, so relabelling units leaves fits unchanged.
        """
        return np.lexsort((self.periods, self.unit_keys[self.unit_codes]))

    @property
    def n_rows(self) -> int:
        """Number of rows."""
        return int(self.frame.shape[0])

    @property
    def n_units(self) -> int:
        """Number of decision makers."""
        return int(self.unit_labels.shape[0])

    def choice_index(self, label: Hashable) -> int:
        """Position of a choice label in :attr:`choices`.

        Integer-like labels match across int/str spellings (``1`` and ``"1"``) only when
        the data's labels are of that type.
        """
        for k, c in enumerate(self.choices):
            if c == label:
                return k
        raise InputError(
            f"choice {label!r} is not observed in column {self.choice!r}; observed choices: "
            f"{', '.join(map(repr, self.choices))}."
        )

    def column(self, name: str) -> np.ndarray:
        """A numeric data column as float64 (validated: finite values only)."""
        if name not in self.frame.columns:
            raise InputError(f"utility column {name!r} is not in the data.")
        s = self.frame[name]
        if not ptypes.is_numeric_dtype(s) and not ptypes.is_bool_dtype(s):
            raise InputError(
                f"utility column {name!r} must be numeric, got dtype {s.dtype}."
            )
        values = s.to_numpy(dtype=np.float64, na_value=np.nan)
        n_bad = int((~np.isfinite(values)).sum())
        if n_bad:
            raise InputError(
                f"utility column {name!r} has {n_bad} missing or infinite values; drop or "
                f"impute those rows."
            )
        return values


def _unit_keys(rest: pd.DataFrame, unit_codes: np.ndarray, periods: np.ndarray) -> np.ndarray:
    """A label-free 64-bit key per unit: a hash of its rows (everything but the unit label)."""
    row_hash = pd.util.hash_pandas_object(rest, index=False).to_numpy(dtype=np.uint64)
    mixed = row_hash * (np.uint64(2) * (periods.astype(np.uint64) & np.uint64(0xFFFF)) + np.uint64(1))
    keys = np.zeros(int(unit_codes.max()) + 1, dtype=np.uint64)
    np.add.at(keys, unit_codes, mixed)
    return keys


def _plain(value: Any) -> Any:
    """NumPy scalars to Python scalars, so labels print and serialise cleanly."""
    return value.item() if isinstance(value, np.generic) else value
