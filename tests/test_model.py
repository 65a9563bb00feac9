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
    (dict(anchor="replace"), "anchor 'replace' is not among the choices observed"),
    (dict(discount=1.0), r"discount must be in \[0, 1\)"),
    (dict(discount=-0.1), r"discount must be in \[0, 1\)"),
    (dict(kind="finite"), "kind must be 'renewal' or 'terminal'"),
    (dict(utility={"keep": {"wc": "wear"}, "swap": {}}), "utility column 'wear' is not in the data"),
    (dict(utility={"stop": {"wc": "w"}}), "utility choice 'stop' is not among the choices observed"),
    (dict(utility={"keep": {"wc": "w", "k": "1"}, "swap": {"k2": "1"}}),
     "not identified"),  # k and k2 are collinear: z_keep - z_swap gives (1, -1)
    (dict(utility={"keep": {"wc": "w", "wc2": "w2"}, "swap": {}}), "not identified"),
    (dict(utility={"keep": {"cc": "c", "k": "1"}, "swap": {}}), "not identified"),
    (dict(utility={"keep": {"both": "1"}, "swap": {"both": "1"}}), "the same for every choice"),
    (dict(utility={}), "utility must map at least one choice"),
    (dict(utility={"keep": {"wc": 3}}), "must be a column name"),
    (dict(persistent=["zone"]), "persistent state 'zone' is not one of the states"),
    (dict(utility={"keep": {"wc": "w"}}),
     r"observed choice\(s\) 'swap' \(\d+ rows\) in column 'a' are not declared.*'swap': \{\}"),
    (dict(utility={"keep": {"wc": "w"}, "Swap": {"sc": "1"}}),
     r"utility choice 'Swap' is not among.*the data spell it 'swap' \(\d+ rows\)"),
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


def _labelled(labels: list) -> oc.Panel:  # type: ignore[type-arg]
    """A small panel whose choice column holds ``labels`` (repeated over the rows)."""
    rng = np.random.default_rng(1)
    n = 120
    df = pd.DataFrame({"id": np.repeat(np.arange(30), 4), "t": np.tile(np.arange(4), 30),
                       "a": [labels[i % len(labels)] for i in range(n)], "w": rng.normal(size=n)})
    return oc.Panel(df, unit="id", period="t", choice="a", states=["w"])


def test_a_choice_without_parameters_is_an_empty_table(panel: oc.Panel) -> None:
    b = oc.Model(anchor="swap", kind="renewal", discount=0.9,
                 utility={"keep": {}, "swap": {"sc": "1", "sw": "w"}}).bind(panel)
    assert b.parameters == ("sc", "sw") and (b.Z[:, 0, :] == 0).all()


def test_near_duplicate_labels_show_both_spellings_and_counts() -> None:
    p = _labelled(["keep", "swap", "keep "])
    m = oc.Model(anchor="swap", kind="renewal", discount=0.9,
                 utility={"keep": {"wc": "w"}, "swap": {"sc": "1"}})
    with pytest.raises(oc.InputError, match=r"spells a choice two ways: 'keep' \(40 rows\) and "
                                            r"'keep ' \(40 rows\)"):
        m.bind(p)
    # Both spellings declared: two deliberate choices.
    oc.Model(anchor="swap", kind="renewal", discount=0.9,
             utility={"keep": {"wc": "w"}, "keep ": {}, "swap": {"sc": "1"}}).bind(p)


def test_two_keys_for_one_choice_are_an_error() -> None:
    p = _labelled([0, 1])
    with pytest.raises(oc.InputError, match=r"two keys for the same choice: utility choice 0 and '0'"):
        oc.Model(anchor=1, kind="renewal", discount=0.9,
                 utility={0: {"wc": "w"}, "0": {"x": "1"}, 1: {}}).bind(p)


@pytest.mark.parametrize("anchor", [1, 1.0, np.int64(1), "1"])
def test_numeric_labels_match_across_types(anchor: object) -> None:
    p = _labelled([0.0, 1.0])
    b = oc.Model(anchor=anchor, kind="renewal", discount=0.9,
                 utility={0: {"wc": "w"}, "1": {"sc": "1"}}).bind(p)
    assert b.anchor_index == 1 and b.Z[:, 1, 1].tolist() == [1.0] * 120
