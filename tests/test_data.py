"""Specification of orthoccp.data: wrapping, sorting, next-row links and input errors."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import orthoccp as oc


def _frame() -> pd.DataFrame:
    return pd.DataFrame(
        {
            "id": ["b", "b", "b", "a", "a", "a"],
            "t": [2, 0, 1, 0, 1, 3],
            "a": ["keep", "keep", "swap", "keep", "swap", "keep"],
            "x": [0.3, 0.1, 0.2, 0.5, 0.6, 0.7],
            "road": pd.Categorical(["hill", "flat", "hill", "flat", "flat", "flat"]),
        }
    )


def test_sorts_and_links_consecutive_periods_only() -> None:
    p = oc.Panel(_frame(), unit="id", period="t", choice="a", states=["x"])
    assert p.frame["id"].tolist() == ["a", "a", "a", "b", "b", "b"]
    assert p.frame["t"].tolist() == [0, 1, 3, 0, 1, 2]
    # a: 0 -> 1 linked; 1 -> 3 is a gap; 3 is last. b: 0 -> 1 -> 2.
    assert p.next_row.tolist() == [1, -1, -1, 4, 5, -1]
    assert p.gap_after.tolist() == [False, True, False, False, False, False]
    assert p.choices == ("keep", "swap")
    assert p.n_units == 2


def test_categorical_states_become_indicators() -> None:
    p = oc.Panel(_frame(), unit="id", period="t", choice="a", states=["x", "road"])
    assert p.feature_names == ("x", "road=flat", "road=hill")
    assert p.features.shape == (6, 3)
    np.testing.assert_array_equal(p.features[:, 1] + p.features[:, 2], 1.0)


def test_features_name_their_state_exactly() -> None:
    df = _frame().assign(**{"road_x": 1.0, "x=1": 2.0})
    p = oc.Panel(df, unit="id", period="t", choice="a", states=["x", "road", "road_x", "x=1"])
    assert p.feature_states == ("x", "road", "road", "road_x", "x=1")  # x is numeric: no clash
    bound = oc.Model(anchor="swap", kind="renewal", discount=0.9, persistent=["road"],
                     utility={"keep": {"c": "x"}, "swap": {"s": "1"}}).bind(p)
    from orthoccp.instruments import persistent_feature_columns

    assert persistent_feature_columns(bound).tolist() == [1, 2]
    # A state named like an indicator column of a categorical state is refused.
    with pytest.raises(oc.InputError, match=r"state 'road=hill' is named like an indicator column "
                                            r"of the categorical state 'road'"):
        oc.Panel(df.assign(**{"road=hill": 0.5}), unit="id", period="t", choice="a",
                 states=["road", "road=hill"])


def test_integer_choice_labels() -> None:
    df = _frame().assign(a=lambda d: (d["a"] == "swap").astype(int))
    p = oc.Panel(df, unit="id", period="t", choice="a", states=["x"])
    assert p.choices == (0, 1)


def _with(**changes: object) -> pd.DataFrame:
    df = _frame()
    for k, v in changes.items():
        df[k] = v
    return df


BAD = [
    (dict(frame=_frame(), unit="bike"), "unit column 'bike' is not in the data"),
    (dict(frame=_frame(), states=["wear"]), "state column 'wear' is not in the data"),
    (dict(frame=_frame(), states=[]), "states is empty"),
    (dict(frame=_frame(), states=["x", "x"]), "listed twice"),
    (dict(frame=_frame(), states=["t"]), "also the period column"),
    (dict(frame=_with(t=[0, 0, 1, 0, 1, 3])), "share a unit and period"),
    (dict(frame=_with(t=[0.5, 0, 1, 0, 1, 3])), "whole numbers"),
    (dict(frame=_with(t=["0", "1", "2", "0", "1", "2"])), "must hold integers"),
    (dict(frame=_with(x=[0.1, np.nan, 0.2, 0.5, 0.6, 0.7])), "1 missing or infinite"),
    (dict(frame=_with(x=[0.1, np.inf, 0.2, 0.5, 0.6, 0.7])), "missing or infinite"),
    (dict(frame=_with(x=["0.1", "oops", "0.2", "0.5", "0.6", "0.7"])), "holds text such as 'oops'"),
    (dict(frame=_with(x=["0.1", "0.3", "0.2", "0.5", "0.6", "0.7"])), "numbers stored as text"),
    (dict(frame=_with(a=["keep", None, "swap", "keep", "swap", "keep"])), "'a' column has 1 missing"),
    (dict(frame=_frame().iloc[0:0]), "no rows"),
    (dict(frame=[1, 2, 3]), "must be a pandas DataFrame"),
]


@pytest.mark.parametrize(("kwargs", "message"), BAD)
def test_bad_inputs_raise_clear_errors(kwargs: dict, message: str) -> None:
    opts = dict(unit="id", period="t", choice="a", states=["x"])
    opts.update({k: v for k, v in kwargs.items() if k != "frame"})
    with pytest.raises(oc.InputError, match=message.replace("(", r"\(").replace(")", r"\)")):
        oc.Panel(kwargs["frame"], **opts)


@pytest.mark.parametrize(("periods", "expected"), [
    ([0, 0, 1, 0, 1, 3], "2 rows share a unit and period (e.g. id='b', t=0)"),
    ([0, 0, 0, 0, 1, 1], "5 rows share a unit and period (e.g. id='a', t=1)"),
])
def test_duplicate_unit_periods_are_counted_like_pandas_duplicated(periods: list, expected: str) -> None:
    # pandas' DataFrame.duplicated(keep=False) is the reference count of rows involved.
    df = _with(t=periods)
    assert int(df.duplicated(["id", "t"], keep=False).sum()) == int(expected.split()[0])
    with pytest.raises(oc.InputError, match=expected.replace("(", r"\(").replace(")", r"\)")):
        oc.Panel(df, unit="id", period="t", choice="a", states=["x"])


def test_unit_keys_survive_pickling_and_ignore_labels() -> None:
    import pickle

    p = oc.Panel(_frame(), unit="id", period="t", choice="a", states=["x"])
    before = pickle.loads(pickle.dumps(p)).unit_keys  # computed after the round trip
    keys = p.unit_keys
    np.testing.assert_array_equal(before, keys)
    np.testing.assert_array_equal(pickle.loads(pickle.dumps(p)).unit_keys, keys)
    relabelled = oc.Panel(_frame().assign(id=lambda d: d["id"].map({"a": "z", "b": "y"})),
                          unit="id", period="t", choice="a", states=["x"])
    # units now sort the other way round; each keeps its key
    np.testing.assert_array_equal(relabelled.unit_keys, keys[::-1])


def _numeric_units() -> pd.DataFrame:
    return _frame().assign(id=lambda d: d["id"].map({"a": 7, "b": 3}))


def test_presorted_rows_give_the_panel_of_a_shuffled_copy() -> None:
    # Reference: pandas' stable sort by (unit, period). A frame already in that order takes
    # the path that skips the sort; it must give the same panel as any row order.
    df = _numeric_units()
    ordered = df.sort_values(["id", "t"], kind="mergesort").set_index(pd.Index([9, 8, 7, 6, 5, 4]))
    opts = dict(unit="id", period="t", choice="a", states=["x", "road"])
    a, b = oc.Panel(ordered, **opts), oc.Panel(df.iloc[::-1], **opts)
    pd.testing.assert_frame_equal(a.frame, b.frame)
    assert a.frame.index.equals(pd.RangeIndex(6))
    for name in ("unit_codes", "periods", "next_row", "gap_after", "choice_codes", "features"):
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name))
    # the panel does not share the caller's rows: editing them leaves it as it was
    ordered.loc[ordered.index[0], "t"] = 99
    assert a.frame["t"].iloc[0] == 0


@pytest.mark.parametrize("missing", [None, np.nan])
@pytest.mark.parametrize("numeric_units", [False, True])
def test_missing_choices_are_counted_on_either_sort_path(missing: object, numeric_units: bool) -> None:
    df = _numeric_units() if numeric_units else _frame()
    df = df.astype({"a": object})
    df.loc[[1, 4], "a"] = missing
    if numeric_units:
        df = df.sort_values(["id", "t"])  # the already-sorted path
    with pytest.raises(oc.InputError, match="'a' column has 2 missing values"):
        oc.Panel(df, unit="id", period="t", choice="a", states=["x"])
    p = oc.Panel(df, unit="id", period="t", choice="a", states=["x"], missing="drop")
    assert p.n_rows == 4 and p.choices == ("keep", "swap")


def test_unit_keys_are_canonical_across_representations(small_ebike) -> None:  # type: ignore[no-untyped-def]
    """Writing the same data differently gives the same keys, hence the same folds."""
    sim = small_ebike
    states = list(sim.states)
    base = oc.Panel(sim.data, unit=sim.unit, period=sim.period, choice=sim.choice, states=states)
    variants = {
        "periods numbered from 1": sim.data.assign(**{sim.period: sim.data[sim.period] + 1}),
        "integer state stored as float": sim.data.assign(
            **{states[0]: sim.data[states[0]].astype(np.float64)}),
        "a value moved in its 13th digit": sim.data.assign(
            **{states[1]: sim.data[states[1]] * (1 + 1e-13)}),
    }
    for what, frame in variants.items():
        p = oc.Panel(frame, unit=sim.unit, period=sim.period, choice=sim.choice, states=states)
        np.testing.assert_array_equal(p.unit_keys, base.unit_keys, err_msg=what)
    reordered = oc.Panel(sim.data, unit=sim.unit, period=sim.period, choice=sim.choice,
                         states=states[::-1])
    np.testing.assert_array_equal(reordered.unit_keys, base.unit_keys)
    # A real change of one value changes that unit's key, and only that unit's.
    changed = sim.data.copy()
    changed.loc[0, states[1]] += 0.5
    p = oc.Panel(changed, unit=sim.unit, period=sim.period, choice=sim.choice, states=states)
    assert int((p.unit_keys != base.unit_keys).sum()) == 1
