"""Specification of orthoccp._labels: the one label matcher and how labels print."""

from __future__ import annotations

import numpy as np
import pytest

import orthoccp as oc
from orthoccp._labels import find_label, keys_by_label, match_keys, match_label, show_label


@pytest.mark.parametrize(
    ("label", "labels", "expected"),
    [
        ("keep", ["keep", "swap"], 0),
        (1, [0, 1], 1),
        (1, [0.0, 1.0], 1),  # numbers match across int and float
        (np.int64(1), [0, 1], 1),
        (1.0, [np.int64(0), np.int64(1)], 1),
        ("1", [0, 1], 1),  # a TOML table key spells the number
        ("1", [0.0, 1.0], 1),
        (1, ["0", "1"], 1),  # a number against text that spells it
        ("1", ["1", "2"], 0),  # exact text first
        ("keep", ["keep ", "swap"], None),  # never by stripping
        ("kee", ["keep", "swap"], None),  # never by prefix
        ("Keep", ["keep", "swap"], None),  # never by case
        (" 1", [0, 1], None),  # text with whitespace is not a number
        (True, [0, 1], None),  # booleans are not numbers
        ("1.5", [1, 2], None),
    ],
)
def test_find_label_rules(label: object, labels: list, expected: int | None) -> None:  # type: ignore[type-arg]
    assert find_label(label, labels) == expected


def test_a_label_matching_several_candidates_is_an_error() -> None:
    with pytest.raises(oc.InputError, match=r"choice 1 matches several labels \('1', '1\.0'\)"):
        find_label(1, ["1", "1.0"], role="choice")


def test_match_label_names_the_near_duplicate_with_its_count() -> None:
    with pytest.raises(oc.InputError, match=r"anchor 'swap' is not among the choices observed in "
                                            r"column 'a' \('keep', 'swap '\); the data spell it "
                                            r"'swap ' \(7 rows\)"):
        match_label("swap", ["keep", "swap "], role="anchor", column="a", counts=[3, 7])


def test_two_keys_for_one_label() -> None:
    assert match_keys(["keep", 1], ["keep", 1.0], role="key") == {"keep": 0, 1: 1}
    with pytest.raises(oc.InputError, match=r"two keys for the same choice: key 0 and '0' both name 0"):
        match_keys([0, "0"], [0, 1], role="key")
    with pytest.raises(oc.InputError, match="two keys for the same choice"):
        keys_by_label([0.0, "0"], [0, 1], role="key")
    assert keys_by_label(["b", "x"], ["a", "b"], role="key") == [None, "b"]


def test_labels_print_as_plain_values() -> None:
    assert show_label(np.int64(8)) == "8"
    assert show_label(np.float64(1.5)) == "1.5"
    assert show_label("keep ") == "'keep '"
