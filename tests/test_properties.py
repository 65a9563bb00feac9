"""Property-based checks (hypothesis): what must not change the estimates, and counts that add up.

* Permuting the rows and relabelling the units leave the estimates unchanged.
* Relabelling the choices (the anchor relabelled with them, in any order of the labels) and
  rescaling a state column leave them unchanged too, given the same fold split. The first
  stage is a tiny LightGBM, which is invariant to the scale of a feature because it splits on
  ranks (histogram bins). The fold split itself is drawn from ``Panel.unit_keys``, a hash of
  each unit's rows including the raw choice labels and state values, so these two tests hold
  the keys fixed to the original panel's (the units, and hence the unit codes, are the same).
* Splitting the units into two halves gives row accountings (and ``missing="drop"`` counts)
  that add up to the pooled panel's.

Tolerance: 1e-8 relative. Relabelling the choices in reverse order flips LightGBM's binary
target, which changes the rounding of its initial score and of the sums over rows; the
estimates then agree to about 1e-14, not bit for bit.
"""

from __future__ import annotations

import warnings
from functools import lru_cache
from typing import Any

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

import orthoccp as oc
from orthoccp.estimate import account_rows
from orthoccp.simulate import simulate

RTOL = 1e-8
ESTIMATES = settings(max_examples=5, deadline=None, derandomize=True, database=None,
                     suppress_health_check=[HealthCheck.too_slow])
COUNTS = settings(max_examples=40, deadline=None, derandomize=True, database=None)


@lru_cache(maxsize=None)
def _sim() -> Any:
    """120 simulated e-bikes x 8 weeks (invented scenario; mechanics only)."""
    return simulate("ebike", units=120, periods=8, seed=3, n_covariates=5)


def _tiny_lgbm() -> tuple[Any, Any]:
    from lightgbm import LGBMClassifier, LGBMRegressor

    opts = dict(n_estimators=20, num_leaves=7, min_child_samples=5, n_jobs=1, verbose=-1)
    return LGBMClassifier(**opts), LGBMRegressor(**opts)


def _panel(frame: pd.DataFrame) -> oc.Panel:
    sim = _sim()
    return oc.Panel(frame, unit=sim.unit, period=sim.period, choice=sim.choice, states=list(sim.states))


def _estimate(panel: oc.Panel, anchor: Any = "swap", utility: dict[Any, Any] | None = None) -> np.ndarray:
    sim = _sim()
    model = oc.Model(anchor=anchor, kind="renewal", discount=sim.discount, utility=utility or sim.utility)
    clf, reg = _tiny_lgbm()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = oc.estimate(panel, model, learner=clf, regressor=reg, folds=3, scheme="plain", seed=0)
    assert list(res.params.index) == ["wear_cost", "swap_cost"]
    return np.concatenate([res.params.to_numpy(), res.std_errors.to_numpy()])


@lru_cache(maxsize=None)
def _base() -> tuple[oc.Panel, np.ndarray]:
    panel = _panel(_sim().data)
    return panel, _estimate(panel)


def _same_keys(panel: oc.Panel, like: oc.Panel) -> oc.Panel:
    """``panel`` with the unit keys (fold split and training order) of ``like``."""
    np.testing.assert_array_equal(panel.unit_labels, like.unit_labels)
    object.__setattr__(panel, "unit_keys", like.unit_keys)
    return panel


# --------------------------------------------------------------------------- invariances
@ESTIMATES
@given(seed=st.integers(0, 2**32 - 1), labels=st.sampled_from(["shifted", "text", "negative"]))
def test_row_order_and_unit_labels_do_not_matter(seed: int, labels: str) -> None:
    sim = _sim()
    rng = np.random.default_rng(seed)
    df = sim.data.iloc[rng.permutation(len(sim.data))].reset_index(drop=True)
    units = df[sim.unit].unique()
    new = rng.permutation(units.size)
    mapping = {
        "shifted": dict(zip(units, new * 7 + 1000)),
        "text": dict(zip(units, [f"bike-{k:04d}" for k in new])),
        "negative": dict(zip(units, -new - 1)),
    }[labels]
    df[sim.unit] = df[sim.unit].map(mapping)
    np.testing.assert_allclose(_estimate(_panel(df)), _base()[1], rtol=RTOL, atol=0)


TEXT = st.text(st.characters(blacklist_categories=("Cs",)), min_size=1, max_size=6)
LABEL_PAIRS = st.one_of(
    st.lists(TEXT, min_size=2, max_size=2, unique=True),
    st.lists(st.integers(-1000, 1000), min_size=2, max_size=2, unique=True),
)


@ESTIMATES
@given(pair=LABEL_PAIRS)
@example(pair=["zz", "aa"])  # the anchor's label sorts first: the choice codes swap
@example(pair=[1, 0])
def test_choice_labels_do_not_matter(pair: list[Any]) -> None:
    keep, swap = pair
    sim = _sim()
    base_panel, expected = _base()
    df = sim.data.assign(**{sim.choice: sim.data[sim.choice].map({"keep": keep, "swap": swap})})
    panel = _same_keys(_panel(df), base_panel)
    utility = {keep: dict(sim.utility["keep"]), swap: dict(sim.utility["swap"])}
    np.testing.assert_allclose(_estimate(panel, anchor=swap, utility=utility), expected, rtol=RTOL, atol=0)


@ESTIMATES
@given(column=st.sampled_from(["wear", "x0", "x1", "x2", "x3", "x4"]),
       factor=st.floats(1e-3, 1e3, allow_nan=False, allow_infinity=False))
@example(column="wear", factor=1 / 3)
def test_rescaling_a_state_does_not_matter(column: str, factor: float) -> None:
    sim = _sim()
    base_panel, expected = _base()
    df = sim.data.assign(**{column: sim.data[column] * factor})
    panel = _same_keys(_panel(df), base_panel)
    np.testing.assert_allclose(_estimate(panel), expected, rtol=RTOL, atol=0)


# --------------------------------------------------------------------------- counts add up
@st.composite
def panels(draw: Any, terminal: bool) -> tuple[pd.DataFrame, np.ndarray]:
    """A small unbalanced panel (gaps, late entries, missing values) and a split of its units.

    Every unit has a 'keep'/'stay' row; each half has a 'swap'/'exit' row, so both halves
    observe both choices, and a unit observed in the last two periods, so both have a moment
    row and share the final period (the terminal censoring rule depends on the last period).
    In terminal panels the exit is a unit's last row.
    """
    T = 6
    n_units = draw(st.integers(2, 12))
    half = np.array(draw(st.lists(st.booleans(), min_size=n_units, max_size=n_units)))
    half[0], half[1] = True, False  # both halves non-empty
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    first_of_half = {0, 1}
    rows = []
    for u in range(n_units):
        k = draw(st.integers(2, T))
        periods = sorted(rng.choice(T, size=k, replace=False).tolist())
        if u in first_of_half:  # observed in the last two periods: a moment row in each half
            periods = sorted(set(periods[:-2]) | {T - 2, T - 1})
        for i, t in enumerate(periods):
            if terminal:
                last = i == len(periods) - 1
                choice = "exit" if last and (u in first_of_half or rng.random() < 0.5) else "stay"
            else:
                choice = "keep" if i == 0 else ("swap" if i == 1 else str(rng.choice(["keep", "swap"])))
            x = float(rng.normal())
            if not terminal and i >= 2 and rng.random() < 0.15:
                x = float(rng.choice([np.nan, np.inf]))
            rows.append({"id": f"u{u}", "t": t, "a": choice, "x": x, "w": float(rng.normal())})
    return pd.DataFrame(rows), half


def _accounting(frame: pd.DataFrame, terminal: bool) -> tuple[oc.RowAccounting, oc.Panel]:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        panel = oc.Panel(frame, unit="id", period="t", choice="a", states=["x", "w"], missing="drop")
    if terminal:
        model = oc.Model(anchor="exit", kind="terminal", discount=0.9,
                         utility={"stay": {"cost": "w"}, "exit": {"scrap": "1"}})
    else:
        model = oc.Model(anchor="swap", kind="renewal", discount=0.9,
                         utility={"keep": {"cost": "w"}, "swap": {"swap_cost": "1"}})
    return account_rows(model.bind(panel))[2], panel


@pytest.mark.parametrize("terminal", [False, True], ids=["renewal", "terminal"])
@COUNTS
@given(data=st.data())
def test_row_accounting_adds_up_over_two_halves(terminal: bool, data: st.DataObject) -> None:
    frame, half = data.draw(panels(terminal))
    in_a = frame["id"].isin([f"u{u}" for u in np.flatnonzero(half)])
    pooled, p_all = _accounting(frame, terminal)
    a, p_a = _accounting(frame[in_a], terminal)
    b, p_b = _accounting(frame[~in_a], terminal)
    for name in ("n_rows", "n_moment_rows", "n_corrected", "n_terminal"):
        assert getattr(pooled, name) == getattr(a, name) + getattr(b, name), name
    for reason, count in pooled.excluded.items():
        assert count == a.excluded.get(reason, 0) + b.excluded.get(reason, 0), reason
    assert pooled.n_moment_rows + sum(pooled.excluded.values()) == pooled.n_rows
    # Rows dropped for missing values add up too, reason by reason, and nothing is lost.
    assert p_all.n_input_rows == p_a.n_input_rows + p_b.n_input_rows == len(frame)
    for reason in set(p_all.dropped_rows) | set(p_a.dropped_rows) | set(p_b.dropped_rows):
        assert p_all.dropped_rows.get(reason, 0) == p_a.dropped_rows.get(reason, 0) + p_b.dropped_rows.get(reason, 0)
    assert p_all.n_rows + p_all.n_dropped == len(frame)
