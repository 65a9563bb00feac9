"""Specification of orthoccp.model: validation against the data and the utility design."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import orthoccp as oc


@pytest.fixture()
def panel() -> oc.Panel:
    rng = np.random.default_rng(0)
    n_units, T = 40, 4
    df = pd.DataFrame(
        {
            "id": np.repeat(np.arange(n_units), T),
            "t": np.tile(np.arange(T), n_units),
            "a": rng.choice(["keep", "swap"], size=n_units * T),
            "w": rng.normal(size=n_units * T),
            "c": 1.0,
        }
    )
    df["w2"] = 2 * df["w"]
    return oc.Panel(df, unit="id", period="t", choice="a", states=["w"])


def test_design_puts_columns_under_their_choices(panel: oc.Panel) -> None:
    # sw multiplies a constant data column: collinear with sc, so only the design is checked.
    m = oc.Model(anchor="swap", kind="renewal", discount=0.9,
                 utility={"keep": {"wc": "w"}, "swap": {"sc": "1", "sw": "c"}})
    b = _unchecked_bind(m, panel)
    assert b.parameters == ("wc", "sc", "sw")
    np.testing.assert_array_equal(b.Z[:, 0, 0], panel.frame["w"])
    assert (b.Z[:, 1, 1] == 1).all() and (b.Z[:, 1, 0] == 0).all() and (b.Z[:, 0, 1] == 0).all()
    assert b.anchor_index == 1 and b.zR_params.tolist() == [2] and b.zR_constants.tolist() == [1]


def _unchecked_bind(m: oc.Model, panel: oc.Panel):  # type: ignore[no-untyped-def]
    from orthoccp.model import BoundModel

    check = BoundModel._check_identified
    try:
        BoundModel._check_identified = lambda self: None  # type: ignore[method-assign]
        return m.bind(panel)
    finally:
        BoundModel._check_identified = check  # type: ignore[method-assign]


BAD = [
    (dict(anchor="replace"), "anchor 'replace' is not among the observed choices"),
    (dict(discount=1.0), r"discount must be in \[0, 1\)"),
    (dict(discount=-0.1), r"discount must be in \[0, 1\)"),
    (dict(kind="finite"), "kind must be 'renewal' or 'terminal'"),
    (dict(utility={"keep": {"wc": "wear"}}), "utility column 'wear' is not in the data"),
    (dict(utility={"stop": {"wc": "w"}}), "utility choice 'stop' is not among the observed"),
    (dict(utility={"keep": {"wc": "w", "k": "1"}, "swap": {"k2": "1"}}),
     "not identified"),  # k and k2 are collinear: z_keep - z_swap gives (1, -1)
    (dict(utility={"keep": {"wc": "w", "wc2": "w2"}}), "not identified"),
    (dict(utility={"keep": {"cc": "c", "k": "1"}}), "not identified"),
    (dict(utility={"keep": {"both": "1"}, "swap": {"both": "1"}}), "the same for every choice"),
    (dict(utility={}), "utility must map at least one choice"),
    (dict(utility={"keep": {"wc": 3}}), "must be a column name"),
    (dict(persistent=["zone"]), "persistent state 'zone' is not one of the states"),
]


@pytest.mark.parametrize(("changes", "message"), BAD)
def test_bad_models_raise_clear_errors(panel: oc.Panel, changes: dict, message: str) -> None:
    spec = dict(anchor="swap", kind="renewal", discount=0.9,
                utility={"keep": {"wc": "w"}, "swap": {"sc": "1"}})
    spec.update(changes)
    with pytest.raises(oc.InputError, match=message):
        oc.Model(**spec).bind(panel)


def test_single_observed_choice_is_rejected() -> None:
    df = pd.DataFrame({"id": [1, 1, 2], "t": [0, 1, 0], "a": ["k", "k", "k"], "x": [1.0, 2.0, 3.0]})
    p = oc.Panel(df, unit="id", period="t", choice="a", states=["x"])
    with pytest.raises(oc.InputError, match="only one choice"):
        oc.Model(anchor="k", kind="renewal", discount=0.5, utility={"k": {"b": "x"}}).bind(p)
