"""Panel data: validation, sorting and the link from each row to its unit's next row.

The data are validated once, here, when they are wrapped. Everything downstream works on
plain NumPy arrays held by :class:`Panel`.
"""

from __future__ import annotations

import functools
import warnings
from decimal import Decimal
from collections.abc import Hashable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np
import pandas as pd
from pandas.api import types as ptypes

from ._errors import InputError, OrthoCCPWarning
from ._labels import match_label, plain_label, show_label

__all__ = ["Panel"]

MISSING_OPTIONS = ("error", "drop")

# Largest state magnitude the learners take: squares of larger values overflow float64.
MAX_FEATURE = 1e150

# Periods are compared as exact integers; beyond 2**53 float64 cannot tell t from t + 1.
_MAX_PERIOD = 2**53


def _check_column(frame: pd.DataFrame, name: str, role: str) -> None:
    if not isinstance(name, str):
        raise InputError(f"{role} must be a column name (str), got {name!r}.")
    if name not in frame.columns:
        raise InputError(
            f"{role} column {name!r} is not in the data; {missing_column_hint(name, frame.columns)}"
        )
    n = 1 if frame.columns.is_unique else int((frame.columns == name).sum())
    if n > 1:
        raise InputError(
            f"{role} column {name!r} appears {n} times in the data; give the columns unique names."
        )


def missing_column_hint(name: str, columns: Iterable[Any], limit: int = 12) -> str:
    """The end of a "column is not in the data" message: the available columns, quoted so
    that surrounding whitespace shows, and the column that differs only by such whitespace
    or by case, if there is one."""
    cols = list(columns)
    shown = ", ".join(repr(plain_label(c)) for c in cols[:limit])
    more = f", ... ({len(cols) - limit} more)" if len(cols) > limit else ""
    text = f"available columns: {shown}{more}."
    near = [c for c in cols if isinstance(c, str) and c != name
            and c.strip().casefold() == name.strip().casefold()]
    if near:
        text += (f" The data have {near[0]!r}, which differs from {name!r} only by case or "
                 f"surrounding whitespace; rename that column (e.g. strip the header's spaces) "
                 f"or use its exact name.")
    return text


def _column_names(value: Any, role: str) -> tuple[str, ...]:
    """A list option of column names (a single name is accepted too)."""
    if isinstance(value, str):
        return (value,)
    if value is None or isinstance(value, Mapping) or not isinstance(value, Iterable):
        raise InputError(
            f"{role} must be a list of column names, got {type(value).__name__} {value!r}."
        )
    return tuple(value)


def _is_number_column(s: pd.Series) -> bool:
    return ptypes.is_numeric_dtype(s) and not ptypes.is_bool_dtype(s)


def as_float(s: pd.Series) -> np.ndarray:
    """A numeric or boolean column as a float64 array, missing values (NA) as NaN.

    NumPy-typed columns are converted directly (``Series.to_numpy`` with ``na_value`` takes a
    slower path even when nothing can be missing).
    """
    if isinstance(s.dtype, np.dtype) and s.dtype.kind in "iufb":
        return s.to_numpy().astype(np.float64)
    return s.to_numpy(dtype=np.float64, na_value=np.nan)


def _n_missing(s: pd.Series) -> int:
    """Missing values (NaN, None, NA) in a column; NumPy integer and boolean columns hold none."""
    if isinstance(s.dtype, np.dtype) and s.dtype.kind in "iub":
        return 0
    return int(np.count_nonzero(s.array.isna()))


def _bad_values(s: pd.Series) -> np.ndarray:
    """Rows that are missing (NaN, None, NA) or, in a numeric column, infinite."""
    bad = np.asarray(s.isna(), dtype=bool)
    if _is_number_column(s) and not ptypes.is_complex_dtype(s):
        values = as_float(s)
        bad = bad | ~np.isfinite(values)
    return bad


def _drop_missing(
    frame: pd.DataFrame, columns: Sequence[tuple[str, str]]
) -> tuple[pd.DataFrame, dict[str, int]]:
    """Drop rows with a missing or infinite value in any of ``columns`` ((name, role) pairs).

    Each dropped row is counted once, under the first of ``columns`` where it has a bad value,
    so the counts add up to the number of dropped rows.
    """
    drop = np.zeros(len(frame), dtype=bool)
    counts: dict[str, int] = {}
    for name, role in columns:
        s = frame[name]
        bad = _bad_values(s)
        new = bad & ~drop
        if new.any():
            what = "missing or infinite value" if _is_number_column(s) else "missing value"
            counts[f"{what} in {role} column {name!r}"] = int(new.sum())
        drop |= bad
    if not drop.any():
        return frame, {}
    return frame.loc[~drop], counts


INDICATOR_WARNING = 50
"""A text or categorical state with more distinct values than this warns: each value becomes
an indicator column the learners must fit (measured: a text state with one value per row made
the first stage 12 times slower and changed the estimate)."""

INDICATOR_LIMIT = 1000
"""A text or categorical state with more distinct values than this is an error: its indicator
columns would take n_rows x 1,000 x 8 bytes (8 GB at 10^6 rows), and a state with that many
values is usually an identifier or free text."""


def _check_indicator_count(col: str, n_levels: int) -> None:
    """Warn above :data:`INDICATOR_WARNING` indicator columns, refuse above :data:`INDICATOR_LIMIT`."""
    if n_levels > INDICATOR_LIMIT:
        raise InputError(
            f"state column {col!r} has {n_levels:,} distinct text or categorical values, which "
            f"would become {n_levels:,} indicator columns (the limit is {INDICATOR_LIMIT:,}); "
            f"such a column is usually an identifier or free text. Drop it from states, encode "
            f"it as numbers, or group its rare values."
        )
    if n_levels > INDICATOR_WARNING:
        warnings.warn(
            f"state column {col!r} becomes {n_levels:,} indicator columns, one per distinct "
            f"value (more than {INDICATOR_WARNING}); the first stage slows down and each "
            f"indicator is seen in few rows. Group rare values, or encode the column as a "
            f"number if its values are ordered.",
            OrthoCCPWarning,
            stacklevel=4,
        )


def _state_matrix(
    frame: pd.DataFrame, states: Sequence[str]
) -> tuple[np.ndarray, tuple[str, ...], tuple[str, ...]]:
    """Numeric feature matrix for the learners; categorical states become indicator columns.

    Returns the matrix, the feature names (``state`` or ``state=level``) and the state each
    feature comes from.
    """
    _check_indicator_names(frame, states)
    blocks: list[np.ndarray] = []
    names: list[str] = []
    sources: list[str] = []
    hint = "drop or impute those rows before wrapping the panel, or pass missing='drop'"
    for col in states:
        s = frame[col]
        if _is_categorical(s):
            if not isinstance(s.dtype, pd.CategoricalDtype):
                # A text column that is really numbers typed as text is a data error.
                converted = pd.to_numeric(s, errors="coerce")
                bad = converted.isna() & s.notna()
                if not bad.any() and s.notna().any():
                    raise InputError(
                        f"state column {col!r} holds numbers stored as text (dtype {s.dtype}"
                        f"{_value_types(s)}); convert it with pd.to_numeric before wrapping "
                        f"the panel."
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
                    f"state column {col!r} has {int(s.isna().sum())} missing values; {hint}."
                )
            try:
                cat = pd.Categorical(s)
            except TypeError as exc:
                raise InputError(
                    f"state column {col!r} mixes value types that cannot be ordered (e.g. "
                    f"strings and numbers); use one type or convert it with .astype(str)."
                ) from exc
            _check_indicator_count(col, len(cat.categories))
            for level_code, level in enumerate(cat.categories):
                blocks.append((cat.codes == level_code).astype(np.float64)[:, None])
                names.append(f"{col}={level}")
                sources.append(col)
            continue
        if ptypes.is_complex_dtype(s):
            raise InputError(
                f"state column {col!r} holds complex numbers; use real numbers, booleans or a "
                f"categorical."
            )
        if ptypes.is_bool_dtype(s) or ptypes.is_numeric_dtype(s):
            values = as_float(s)
        elif (numbers := _object_numbers(s)) is not None:
            values = numbers
        else:
            raise InputError(
                f"state column {col!r} has unsupported dtype {s.dtype}; use numbers, "
                f"booleans or a categorical."
            )
        n_bad = int((~np.isfinite(values)).sum())
        if n_bad:
            raise InputError(f"state column {col!r} has {n_bad} missing or infinite values; {hint}.")
        largest = float(np.abs(values).max()) if values.size else 0.0
        if largest > MAX_FEATURE:
            raise InputError(
                f"state column {col!r} holds values as large as {largest:.3g}, too large for the "
                f"learners (their sums of squares overflow beyond about {MAX_FEATURE:.0e}); "
                f"rescale the column (e.g. divide it by a power of ten or take logs)."
            )
        blocks.append(values[:, None])
        names.append(col)
        sources.append(col)
    if not blocks:
        return np.empty((len(frame), 0)), (), ()
    # Column-major, so each state is one contiguous column that the frame can share
    # (_share_state_columns); learners get row-major copies of their rows (backends.take_rows).
    out = np.empty((len(frame), len(blocks)), order="F")
    for i, block in enumerate(blocks):
        out[:, i] = block[:, 0]
    return out, tuple(names), tuple(sources)


def _is_categorical(s: pd.Series) -> bool:
    """Categorical or text (an object column of numbers, booleans or Decimals is numeric)."""
    if isinstance(s.dtype, pd.CategoricalDtype):
        return True
    return (ptypes.is_object_dtype(s) or ptypes.is_string_dtype(s)) and _object_numbers(s) is None


def _value_types(s: pd.Series) -> str:
    """For a message on an object column: `` holding values of type str, date``."""
    if not ptypes.is_object_dtype(s):
        return ""
    kinds = sorted({type(v).__name__ for v in s.dropna().to_numpy()})
    if not kinds:
        return ""
    more = ", ..." if len(kinds) > 4 else ""
    return f" holding values of type {', '.join(kinds[:4])}{more}"


def _object_numbers(s: pd.Series) -> np.ndarray | None:
    """An object column whose values are all numbers (booleans as 0/1, ``decimal.Decimal``
    as float) or missing, as float64 with NaN for missing; None when any value is not."""
    if not ptypes.is_object_dtype(s):
        return None
    values = s.to_numpy()
    present = ~np.asarray(pd.isna(s), dtype=bool)
    if not present.any():
        return None
    if not all(isinstance(v, (bool, int, float, np.number, np.bool_, Decimal))
               for v in values[present]):
        return None
    out = np.full(values.shape[0], np.nan)
    out[present] = [float(v) for v in values[present]]
    return out


def _check_indicator_names(frame: pd.DataFrame, states: Sequence[str]) -> None:
    """A state named like an indicator column of a categorical state (``"x0=hi"`` beside a
    text state ``"x0"``) would make the feature names ambiguous: refuse it."""
    categorical = [c for c in states if _is_categorical(frame[c])]
    for name in states:
        for c in categorical:
            if name != c and name.startswith(f"{c}="):
                raise InputError(
                    f"state {name!r} is named like an indicator column of the categorical "
                    f"state {c!r} (its levels become columns {c}=<level>); rename the column "
                    f"{name!r}, e.g. without '='."
                )


def _share_state_columns(
    frame: pd.DataFrame, features: np.ndarray, names: tuple[str, ...]
) -> pd.DataFrame:
    """The frame with its float64 state columns replaced by views of the feature matrix.

    The values are the same, so the states are held once instead of twice. The matrix is made
    read-only, so an in-place edit of such a column raises instead of changing the features
    behind the panel's back.
    """
    if len(set(names)) < len(names):  # a column named like an indicator ("c=1"): keep copies
        return frame
    position = {name: i for i, name in enumerate(names)}
    shared = [c for c in frame.columns if c in position and frame[c].dtype == np.float64]
    if not shared:
        return frame
    features.flags.writeable = False  # before the views are taken: they inherit it
    columns = {c: features[:, position[c]] if c in shared else frame[c] for c in frame.columns}
    return pd.DataFrame(columns, index=frame.index, copy=False)


def _check_periods(per: pd.Series, period: str) -> np.ndarray:
    """The period column as int64, or an InputError naming the first bad value."""
    if not _is_number_column(per) or ptypes.is_complex_dtype(per):
        raise InputError(
            f"period column {period!r} must hold integers, got dtype {per.dtype}."
        )
    values = as_float(per)
    finite = np.isfinite(values)
    if not finite.all():
        n_bad = int((~finite).sum())
        raise InputError(
            f"period column {period!r} must hold whole numbers; found {n_bad} missing or "
            f"infinite values (drop those rows, or pass missing='drop')."
        )
    whole = values == np.round(values)
    if not whole.all():
        bad = float(values[~whole][0])
        raise InputError(
            f"period column {period!r} must hold whole numbers; found {bad!r}."
        )
    big = np.abs(values) >= _MAX_PERIOD
    if big.any():
        raise InputError(
            f"period column {period!r} holds values too large to be periods (e.g. "
            f"{float(values[big][0]):.6g}); number the periods with small integers such as "
            f"0, 1, 2, ..."
        )
    return per.to_numpy(dtype=np.float64).astype(np.int64)


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
    missing : {"error", "drop"}, default="error"
        What to do with rows that have a missing (NaN, None) value in the unit, period,
        choice, state or ``extra_columns`` columns, or an infinite value in a numeric one.
        ``"error"`` raises :class:`~orthoccp.InputError`; ``"drop"`` drops those rows, records
        the counts in :attr:`dropped_rows` and warns (:class:`~orthoccp.OrthoCCPWarning`).
        A dropped row leaves a gap in its unit's history: the rows around it are not linked,
        and the row accounting of the results counts them.
    extra_columns : sequence of str, default=()
        Further columns whose missing values ``missing="drop"`` also drops (typically the
        utility columns of the model). They are not features.

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
    n_input_rows : int
        Rows of the frame as passed in (before ``missing="drop"``).
    dropped_rows : dict
        Reason -> number of rows dropped by ``missing="drop"``. Each dropped row is counted
        once, under the first column (unit, period, choice, states, extra columns, in that
        order) where it has a missing value, so the counts add up to :attr:`n_dropped`.
    features : numpy.ndarray
        (n_rows, n_features) float64 learner features, read-only. The frame's float64 state
        columns are views of it (the states are held once), so edit ``frame.copy()``, not
        ``frame`` in place.
    feature_names : tuple of str
        Name of each feature column: the state, or ``state=level`` for the indicator columns
        of a categorical state.
    feature_states : tuple of str
        The state each feature column comes from (matched exactly, never by name prefix).
    source_index : pandas.Index
        The index label, in the frame as passed in, of each row of :attr:`frame` (so a
        per-row result can be put back on the user's rows: ``frame.index`` is a fresh
        ``RangeIndex``).

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
    missing: str = field(init=False)
    choices: tuple[Any, ...] = field(init=False)
    choice_codes: np.ndarray = field(init=False, repr=False)
    unit_codes: np.ndarray = field(init=False, repr=False)
    unit_labels: np.ndarray = field(init=False, repr=False)
    periods: np.ndarray = field(init=False, repr=False)
    next_row: np.ndarray = field(init=False, repr=False)
    gap_after: np.ndarray = field(init=False, repr=False)
    features: np.ndarray = field(init=False, repr=False)
    feature_names: tuple[str, ...] = field(init=False)
    feature_states: tuple[str, ...] = field(init=False, repr=False)
    n_input_rows: int = field(init=False, repr=False)
    dropped_rows: dict[str, int] = field(init=False, repr=False)
    source_index: pd.Index = field(init=False, repr=False)

    def __init__(
        self,
        frame: pd.DataFrame,
        *,
        unit: str,
        period: str,
        choice: str,
        states: Sequence[str],
        missing: Literal["error", "drop"] = "error",
        extra_columns: Sequence[str] = (),
    ) -> None:
        if not isinstance(frame, pd.DataFrame):
            raise InputError(f"data must be a pandas DataFrame, got {type(frame).__name__}.")
        if isinstance(frame.columns, pd.MultiIndex):
            raise InputError(
                "data has hierarchical (MultiIndex) columns; flatten them to plain column names."
            )
        if len(frame) == 0:
            raise InputError("data has no rows.")
        if not isinstance(missing, str) or missing not in MISSING_OPTIONS:
            raise InputError(f"missing must be 'error' or 'drop', got {missing!r}.")
        states = _column_names(states, "states")
        extra = _column_names(extra_columns, "extra_columns")
        for name, role in ((unit, "unit"), (period, "period"), (choice, "choice")):
            _check_column(frame, name, role)
        if not states:
            raise InputError("states is empty; name at least one state column.")
        for s in states:
            _check_column(frame, s, "state")
        for s in extra:
            _check_column(frame, s, "extra")
        roles = {unit: "unit", period: "period", choice: "choice"}
        if len(roles) < 3:
            raise InputError("unit, period and choice must be three different columns.")
        for s in states:
            if s in roles:
                raise InputError(f"state {s!r} is also the {roles[s]} column; remove it from states.")
        if len(set(states)) != len(states):
            dup = [s for s in states if states.count(s) > 1][0]
            raise InputError(f"state {dup!r} is listed twice in states.")

        n_input = len(frame)
        dropped: dict[str, int] = {}
        if missing == "drop":
            checked = [(unit, "unit"), (period, "period"), (choice, "choice")]
            checked += [(s, "state") for s in states]
            checked += [(s, "extra") for s in extra if s not in roles and s not in states]
            frame, dropped = _drop_missing(frame, checked)
            if len(frame) == 0:
                reasons = "; ".join(f"{k}: {v}" for k, v in dropped.items())
                raise InputError(
                    f"missing='drop' dropped all {n_input} rows ({reasons}); nothing is left "
                    f"to estimate from."
                )
            if dropped:
                n_dropped = sum(dropped.values())
                reasons = "; ".join(f"{v} with a {k}" for k, v in dropped.items())
                warnings.warn(
                    f"dropped {n_dropped} of {n_input} rows ({reasons}); the rows next to "
                    f"them are not linked across the gap (see Panel.dropped_rows and the row "
                    f"accounting of the results).",
                    OrthoCCPWarning,
                    stacklevel=2,
                )

        n_missing = _n_missing(frame[unit])
        if n_missing:
            _raise_missing(unit, n_missing)
        periods = _check_periods(frame[period], period)

        try:
            if _in_panel_order(frame[unit], periods):
                source_index = frame.index  # the same rows a stable sort gives
                sorted_frame = frame.reset_index(drop=True)
            else:
                sorted_frame = frame.sort_values([unit, period], kind="mergesort")
                source_index = sorted_frame.index
                sorted_frame = sorted_frame.reset_index(drop=True)
                periods = _check_periods(sorted_frame[period], period)
            unit_labels, unit_codes = _sorted_runs(sorted_frame[unit].to_numpy())
        except TypeError as exc:
            raise InputError(
                f"unit column {unit!r} mixes label types that cannot be ordered (e.g. strings "
                f"and numbers); use one type, e.g. with .astype(str)."
            ) from exc
        n = len(sorted_frame)
        same_unit_next = np.zeros(n, dtype=bool)
        same_unit_next[:-1] = unit_codes[1:] == unit_codes[:-1]
        # sorted by (unit, period): rows sharing both are neighbours
        repeat = same_unit_next[:-1] & (periods[1:] == periods[:-1])
        if repeat.any():
            dup_mask = np.zeros(n, dtype=bool)
            dup_mask[:-1] |= repeat
            dup_mask[1:] |= repeat
            first = sorted_frame.loc[dup_mask, [unit, period]].iloc[0]
            raise InputError(
                f"{int(dup_mask.sum())} rows share a unit and period (e.g. {unit}="
                f"{show_label(first[unit])}, {period}={show_label(first[period])}); each unit-period "
                f"must appear once."
            )

        choice_values = sorted_frame[choice].to_numpy()
        try:
            choices, codes = _sorted_codes(choice_values)
        except TypeError as exc:
            raise InputError(
                f"choice column {choice!r} mixes label types (e.g. strings and numbers); "
                f"use one type."
            ) from exc
        n_missing = int(np.count_nonzero(codes < 0))
        if n_missing:
            _raise_missing(choice, n_missing)
        consecutive = np.zeros(n, dtype=bool)
        consecutive[:-1] = periods[1:] == periods[:-1] + 1
        linked = same_unit_next & consecutive
        next_row = np.where(linked, np.arange(n) + 1, -1)
        gap_after = same_unit_next & ~consecutive

        features, feature_names, feature_states = _state_matrix(sorted_frame, states)
        if sorted_frame.columns.is_unique:
            sorted_frame = _share_state_columns(sorted_frame, features, feature_names)
        features.flags.writeable = False

        object.__setattr__(self, "frame", sorted_frame)
        object.__setattr__(self, "unit", unit)
        object.__setattr__(self, "period", period)
        object.__setattr__(self, "choice", choice)
        object.__setattr__(self, "states", states)
        object.__setattr__(self, "missing", missing)
        object.__setattr__(self, "choices", tuple(plain_label(c) for c in choices))
        object.__setattr__(self, "choice_codes", codes.astype(np.int64))
        object.__setattr__(self, "unit_codes", unit_codes.astype(np.int64))
        object.__setattr__(self, "unit_labels", unit_labels)
        object.__setattr__(self, "periods", periods)
        object.__setattr__(self, "next_row", next_row.astype(np.int64))
        object.__setattr__(self, "gap_after", gap_after)
        object.__setattr__(self, "features", features)
        object.__setattr__(self, "feature_names", feature_names)
        object.__setattr__(self, "feature_states", feature_states)
        object.__setattr__(self, "n_input_rows", int(n_input))
        object.__setattr__(self, "dropped_rows", dropped)
        object.__setattr__(self, "source_index", source_index)

    @functools.cached_property
    def unit_keys(self) -> np.ndarray:
        """(n_units,) a label-free 64-bit key per unit: a hash of its rows (every column the
        panel uses but the unit label), so relabelling units or reordering rows leaves it
        unchanged. The fold split orders units by it. Computed at first use (the discrete
        estimators never need it).

        The key is canonical: it hashes the choice codes, the states in name order with
        numeric values as float64 rounded to ``KEY_DIGITS`` significant digits (text states as
        their text), and periods counted from each unit's first period. Writing the same data
        differently (``2.0`` for ``2``, states listed in another order, periods numbered from
        1, a value changed in its 12th digit) gives the same key, hence the same folds.
        """
        return _unit_keys(self.frame, self.states, self.choice_codes, self.unit_codes,
                          self.periods)

    @property
    def canonical_order(self) -> np.ndarray:
        """Row order by (unit key, period): independent of unit labels and input row order.

        Learners are trained on rows in this order, so relabelling units leaves fits unchanged.
        """
        return np.lexsort((self.periods, self.unit_keys[self.unit_codes]))

    @property
    def n_rows(self) -> int:
        """Number of rows (after ``missing="drop"``)."""
        return int(self.frame.shape[0])

    @property
    def n_units(self) -> int:
        """Number of decision makers."""
        return int(self.unit_labels.shape[0])

    @property
    def n_dropped(self) -> int:
        """Rows dropped by ``missing="drop"`` (0 with ``missing="error"``)."""
        return int(sum(self.dropped_rows.values()))

    def describe_dropped(self) -> str:
        """One line on the rows dropped for missing values (empty when none were)."""
        if not self.dropped_rows:
            return ""
        reasons = ", ".join(f"{v} {k}" for k, v in self.dropped_rows.items())
        return f"{self.n_dropped} of {self.n_input_rows} input rows dropped: {reasons}."

    def choice_index(self, label: Hashable) -> int:
        """Position of a choice label in :attr:`choices`.

        Labels match exactly, or as the same number (``1``, ``1.0`` and ``"1"``), by the
        package's one label matcher; never by case, whitespace or prefix.
        """
        return match_label(label, self.choices, role="choice", column=self.choice)

    def column(self, name: str) -> np.ndarray:
        """A numeric data column as float64 (validated: finite values only)."""
        if name not in self.frame.columns:
            raise InputError(
                f"utility column {name!r} is not in the data; "
                f"{missing_column_hint(name, self.frame.columns)}"
            )
        s = self.frame[name]
        if isinstance(s, pd.DataFrame):
            raise InputError(
                f"utility column {name!r} appears {s.shape[1]} times in the data; give the "
                f"columns unique names."
            )
        numbers = _object_numbers(s)
        if numbers is not None:
            values = numbers
        elif ptypes.is_complex_dtype(s) or not (ptypes.is_numeric_dtype(s) or ptypes.is_bool_dtype(s)):
            raise InputError(
                f"utility column {name!r} must be numeric, got dtype {s.dtype}"
                f"{_value_types(s)}; convert it with pd.to_numeric."
            )
        else:
            values = as_float(s)
        n_bad = int((~np.isfinite(values)).sum())
        if n_bad:
            raise InputError(
                f"utility column {name!r} has {n_bad} missing or infinite values; drop or "
                f"impute those rows, or pass missing='drop' with the column in extra_columns."
            )
        return values


def _sorted_runs(values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Labels and codes of an already sorted column (``np.unique`` without its sort)."""
    if values.dtype.kind == "O":  # a sort that mixed label types would have raised already
        _sorted_codes(values[np.r_[True, values[1:] != values[:-1]]])
    start = np.empty(values.size, dtype=bool)
    start[:1] = True
    start[1:] = values[1:] != values[:-1]
    return values[start], np.cumsum(start) - 1


def _raise_missing(name: str, n_missing: int) -> None:
    raise InputError(
        f"{name!r} column has {n_missing} missing values; drop those rows, or pass "
        f"missing='drop'."
    )


def _in_panel_order(units: pd.Series, periods: np.ndarray) -> bool:
    """Whether rows with numeric unit labels are already sorted by (unit, period).

    Then a stable sort would return them as they are, so the copy it makes can be skipped.
    Other labels (text, categories) are always sorted by pandas.
    """
    if not (isinstance(units.dtype, np.dtype) and units.dtype.kind in "iuf"):
        return False
    u = units.to_numpy()
    later = u[1:] > u[:-1]
    same = u[1:] == u[:-1]
    return bool(np.all(later | (same & (periods[1:] >= periods[:-1]))))


def _sorted_codes(values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Sorted distinct labels and each value's position among them, like ``np.unique(...,
    return_inverse=True)`` but by hashing: only the distinct labels are sorted. Missing values
    (NaN, None, NA) get code -1 and are not labels. Raises TypeError for labels that cannot
    be ordered (e.g. strings mixed with numbers)."""
    codes, uniques = pd.factorize(values, sort=False)
    uniques = np.asarray(uniques, dtype=values.dtype)
    kinds = {type(u) for u in uniques} if uniques.dtype.kind == "O" else set()
    if len(kinds) > 1 and not all(issubclass(k, (int, float, np.number)) for k in kinds):
        raise TypeError(f"labels of mixed types {sorted(k.__name__ for k in kinds)}")
    order = np.argsort(uniques, kind="stable")
    rank = np.empty(order.size + 1, dtype=order.dtype)
    rank[order] = np.arange(order.size)
    rank[-1] = -1  # code -1 (missing) stays -1
    return uniques[order], rank[codes]


KEY_DIGITS = 10
"""Significant digits of a numeric state that enter :attr:`Panel.unit_keys`."""


def _round_significant(values: np.ndarray, digits: int) -> tuple[np.ndarray, np.ndarray]:
    """``values`` as (mantissa integer, decimal exponent) pairs at ``digits`` significant digits.

    Two numbers that round to the same ``digits`` digits give bit-identical pairs (no division
    that could leave a last-bit difference); zero and -0.0 both give (0, 0).
    """
    mantissa = np.zeros(values.shape, dtype=np.float64)
    exponent = np.zeros(values.shape, dtype=np.float64)
    nz = np.isfinite(values) & (values != 0)
    mag = np.floor(np.log10(np.abs(values[nz])))
    mantissa[nz] = np.round(values[nz] * 10.0 ** (digits - 1 - mag))
    # a mantissa rounded up to 10**digits belongs to the next decade
    up = np.abs(mantissa[nz]) >= 10.0**digits
    mag[up] += 1
    mantissa[np.flatnonzero(nz)[up]] = np.sign(values[nz][up]) * 10.0 ** (digits - 1)
    exponent[nz] = mag
    mantissa[~np.isfinite(values)] = values[~np.isfinite(values)]
    return mantissa + 0.0, exponent


def _unit_keys(
    frame: pd.DataFrame,
    states: Sequence[str],
    choice_codes: np.ndarray,
    unit_codes: np.ndarray,
    periods: np.ndarray,
) -> np.ndarray:
    """A canonical, label-free 64-bit key per unit: a hash of its rows (all but the unit label).

    The rows are sorted by unit, so each unit is one run of rows; the key is the sum of its
    rows' (period-mixed) hashes modulo 2**64, which does not depend on the rows' order.
    Numeric states enter as float64 rounded to :data:`KEY_DIGITS` significant digits, states
    in name order, periods relative to the unit's first period (see :attr:`Panel.unit_keys`).
    """
    columns: dict[str, Any] = {"choice": choice_codes.astype(np.int64)}
    for k, name in enumerate(sorted(states, key=str)):
        col = frame[name]
        if _is_number_column(col) and not ptypes.is_complex_dtype(col):
            mantissa, exponent = _round_significant(as_float(col), KEY_DIGITS)
            columns[f"m{k}"], columns[f"e{k}"] = mantissa, exponent
        else:
            columns[f"s{k}"] = col.astype(str).to_numpy()
    rest = pd.DataFrame(columns)
    row_hash = pd.util.hash_pandas_object(rest, index=False).to_numpy(dtype=np.uint64)
    starts = np.flatnonzero(np.r_[True, unit_codes[1:] != unit_codes[:-1]])
    first = np.repeat(periods[starts], np.diff(np.r_[starts, unit_codes.size]))
    relative = (periods - first).astype(np.uint64)
    mixed = row_hash * (np.uint64(2) * (relative & np.uint64(0xFFFF)) + np.uint64(1))
    return np.add.reduceat(mixed, starts)

