"""Tests of :mod:`orthoccp.spec`: parsing and validation, the TOML writer, data files."""

from __future__ import annotations

import copy
import importlib.util
import re
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

import orthoccp as oc
from orthoccp.spec import (
    InferenceSpec,
    Spec,
    SpecError,
    data_format,
    data_stem,
    dumps_toml,
    parse_spec,
    read_data,
    read_spec,
    write_data,
    write_spec,
)

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

HAS_PYARROW = importlib.util.find_spec("pyarrow") is not None

# The spec of the issue, verbatim in shape.
ISSUE_SPEC = """\
[data]
unit = "bike"             # column of the decision maker
period = "week"           # integer period column
choice = "action"         # chosen alternative (labels as strings or integers)
states = ["wear", "x0", "x1"]   # columns the first-stage learners see
# path = "panel.csv"      # optional: data file, relative to the spec (the DATA argument overrides)

[model]
kind = "renewal"          # or "terminal"
anchor = "swap"           # label of the renewal / terminal choice
discount = 0.95
# persistent = ["x0"]     # optional

[utility.keep]            # one table per choice: parameter name = column ("1" = constant)
wear_cost = "wear_scaled"

[utility.swap]
swap_cost = "1"

[first_stage]
learner = "lightgbm"
folds = 5
seed = 0
# splits = 1, scheme = "plain", clip = 1e-4   (optional)

# [inference]  optional: cov = "clustered", small_sample = true, debias = true
"""


def base_doc() -> dict[str, Any]:
    """A valid spec document (fresh copy)."""
    return {
        "data": {"unit": "bike", "period": "week", "choice": "action", "states": ["wear", "x0"]},
        "model": {"kind": "renewal", "anchor": "swap", "discount": 0.95},
        "utility": {"keep": {"wear_cost": "wear_scaled"}, "swap": {"swap_cost": "1"}},
        "first_stage": {"learner": "logit", "folds": 3, "seed": 1},
    }


def small_frame(choices: tuple[Any, Any] = ("keep", "swap")) -> pd.DataFrame:
    """A tiny two-choice panel."""
    rng = np.random.default_rng(0)
    n_units, n_periods = 30, 4
    unit = np.repeat(np.arange(n_units), n_periods)
    week = np.tile(np.arange(n_periods), n_units)
    wear = rng.integers(0, 10, unit.size)
    action = np.where(rng.random(unit.size) < 0.3, choices[1], choices[0])
    return pd.DataFrame(
        {
            "bike": unit,
            "week": week,
            "action": action,
            "wear": wear,
            "wear_scaled": wear / 10,
            "x0": rng.standard_normal(unit.size),
        }
    )


# --------------------------------------------------------------------------- parsing
def test_issue_spec_is_accepted(tmp_path: Path) -> None:
    path = tmp_path / "spec.toml"
    path.write_text(ISSUE_SPEC, encoding="utf-8")
    spec = read_spec(path)
    assert spec.data.states == ("wear", "x0", "x1")
    assert spec.data.path is None
    assert spec.model.kind == "renewal" and spec.model.anchor == "swap"
    assert spec.model.discount == 0.95
    assert dict(spec.utility["keep"]) == {"wear_cost": "wear_scaled"}
    assert spec.parameters == ("wear_cost", "swap_cost")
    assert spec.first_stage.learner == "lightgbm" and spec.first_stage.folds == 5
    assert spec.first_stage.seed == 0 and spec.first_stage.scheme is None
    assert spec.inference == InferenceSpec()
    assert spec.source == path


def test_defaults_and_options() -> None:
    doc = base_doc()
    del doc["first_stage"]
    spec = parse_spec(doc)
    # Keys left out are not passed: the estimator's own defaults apply.
    assert spec.estimate_options() == {}
    assert spec.first_stage.learner is None and spec.inference.debias is None
    doc["first_stage"] = {"learner": "logit", "folds": 3, "seed": 2, "splits": 2, "scheme": "plain", "clip": 0.001,
                          "model_ccp_steps": 2}
    doc["inference"] = {"moments": "standard", "debias": False, "cov": "clustered", "small_sample": False}
    assert parse_spec(doc).estimate_options() == {
        "learner": "logit",
        "folds": 3,
        "seed": 2,
        "splits": 2,
        "scheme": "plain",
        "clip": 0.001,
        "model_ccp_steps": 2,
        "cov": "clustered",
        "small_sample": False,
        "debias": False,
        "moments": "standard",
    }


def test_unset_options_follow_the_estimator_defaults() -> None:
    import inspect

    doc = base_doc()
    doc["first_stage"] = {"learner": "logit", "folds": 3}
    spec = parse_spec(doc)
    panel = spec.build_panel(small_frame())
    res = oc.estimate(panel, spec.build_model(panel), **spec.estimate_options())
    defaults = inspect.signature(oc.estimate).parameters
    assert res.scheme == defaults["scheme"].default
    assert res.seed == defaults["seed"].default
    assert res.clip == defaults["clip"].default


def test_relative_path_resolves_against_spec_folder(tmp_path: Path) -> None:
    sub = tmp_path / "specs"
    doc = base_doc()
    doc["data"]["path"] = "../data/panel.csv"
    write_spec(sub / "s.toml", doc)
    spec = read_spec(sub / "s.toml")
    assert spec.data.path is not None
    assert spec.data.path.resolve() == (tmp_path / "data" / "panel.csv").resolve()
    # DATA on the command line overrides the spec and is not re-based.
    assert spec.data_path("other.csv") == Path("other.csv")


def test_missing_data_path_is_an_error() -> None:
    with pytest.raises(SpecError, match=r"no data file.*DATA"):
        parse_spec(base_doc()).data_path()


def _set(doc: dict[str, Any], dotted: str, value: Any) -> None:
    *parents, last = dotted.split(".")
    node = doc
    for key in parents:
        node = node.setdefault(key, {})
    if value is _DELETE:
        del node[last]
    else:
        node[last] = value


_DELETE = object()

BAD_SPECS = [
    ("spam", 1, "spam", r"unknown table or key 'spam'.*valid tables: data, model, utility"),
    ("data.colour", "x", "data.colour", r"unknown key 'colour' in \[data\]; valid keys: unit, period"),
    ("first_stage.foldz", 3, "first_stage.foldz", r"valid keys: learner, regressor, folds"),
    ("inference.level", 0.9, "inference.level", r"valid keys: cov, small_sample, debias"),
    ("model.extra", 1, "model.extra", r"valid keys: kind, anchor, discount, persistent"),
    ("data.unit", _DELETE, "data.unit", r"missing required key data\.unit"),
    ("model.discount", _DELETE, "model.discount", r"missing required key model\.discount"),
    ("data.states", "wear", "data.states", r"data\.states must be an array of strings, got 'wear' \(string\)"),
    ("data.states", [], "data.states", r"at least one"),
    ("data.states", ["wear", 3], "data.states", r"element 3 \(integer\)"),
    ("data.states", ["wear", "wear"], "data.states", r"'wear' twice"),
    ("data.states", ["wear", "bike"], "data.states", r"already data\.unit"),
    ("data.unit", 7, "data.unit", r"data\.unit must be a string, got 7 \(integer\)"),
    ("model.kind", "absorbing", "model.kind", r"'renewal', 'terminal', got 'absorbing'"),
    ("model.anchor", True, "model.anchor", r"string or integer\), got True \(boolean\)"),
    ("model.discount", 1.0, "model.discount", r"must be in \[0, 1\).*got 1\.0"),
    ("model.discount", -0.1, "model.discount", r"must be in \[0, 1\)"),
    ("model.discount", "0.9", "model.discount", r"must be a number in \[0, 1\), got '0\.9' \(string\)"),
    ("model.persistent", ["x9"], "model.persistent", r"'x9', which is not one of data\.states"),
    ("first_stage.folds", "5", "first_stage.folds", r"integer >= 2, got '5' \(string\)"),
    ("first_stage.folds", 1, "first_stage.folds", r"integer >= 2, got 1"),
    ("first_stage.folds", 2.5, "first_stage.folds", r"got 2\.5 \(float\)"),
    ("first_stage.folds", True, "first_stage.folds", r"got True \(boolean\)"),
    ("first_stage.seed", -1, "first_stage.seed", r"integer >= 0"),
    ("first_stage.learner", "xgboost", "first_stage.learner", r"one of 'lightgbm', 'logit'.*got 'xgboost'"),
    ("first_stage.scheme", "fancy", "first_stage.scheme", r"'plain', 'nested'"),
    ("first_stage.clip", 0.7, "first_stage.clip", r"\(0, 0\.5\)"),
    ("inference.cov", "robust", "inference.cov", r"inference\.cov must be one of"),
    ("inference.debias", "yes", "inference.debias", r"true or false, got 'yes' \(string\)"),
    ("inference.moments", "fancy", "inference.moments", r"'standard', 'renewal_robust'"),
    ("utility.keep", "wear", "utility.keep", r"must be a table of parameter = column"),
    ("utility.keep.wear_cost", 1, "utility.keep.wear_cost", r"must be a string, got 1 \(integer\)"),
    ("first_stage", 3, "first_stage", r"first_stage must be a table, got 3 \(integer\)"),
]


@pytest.mark.parametrize(("dotted", "value", "key", "fragment"), BAD_SPECS, ids=[c[0] + "=" + repr(c[1]) for c in BAD_SPECS])
def test_bad_spec(dotted: str, value: Any, key: str, fragment: str) -> None:
    doc = copy.deepcopy(base_doc())
    _set(doc, dotted, value)
    with pytest.raises(SpecError, match=fragment) as info:
        parse_spec(doc, source="my.toml")
    assert info.value.key == key
    assert str(info.value).startswith("my.toml: ")
    assert isinstance(info.value, oc.InputError) and isinstance(info.value, ValueError)


def test_utility_without_parameters() -> None:
    doc = base_doc()
    doc["utility"] = {"keep": {}, "swap": {}}
    with pytest.raises(SpecError, match="declare no parameters"):
        parse_spec(doc)
    doc["utility"] = {}
    with pytest.raises(SpecError, match=r"\[utility\] is empty"):
        parse_spec(doc)


def test_invalid_toml_and_missing_file(tmp_path: Path) -> None:
    bad = tmp_path / "bad.toml"
    bad.write_text("[data]\nunit = = 'x'\n", encoding="utf-8")
    with pytest.raises(SpecError, match=r"bad\.toml: not valid TOML.*line 2"):
        read_spec(bad)
    with pytest.raises(FileNotFoundError, match="spec file not found"):
        read_spec(tmp_path / "nope.toml")


def test_with_options() -> None:
    spec = parse_spec(base_doc())
    new = spec.with_options(learner="lightgbm", folds=4, seed=9, debias=False)
    assert (new.first_stage.learner, new.first_stage.folds, new.first_stage.seed) == ("lightgbm", 4, 9)
    assert new.inference.debias is False
    assert spec.first_stage.folds == 3  # frozen original untouched
    assert spec.with_options() == spec
    with pytest.raises(SpecError, match=r"--folds must be an integer >= 2, got 1"):
        spec.with_options(folds=1)
    with pytest.raises(SpecError, match=r"--learner must be one of"):
        spec.with_options(learner="boost")
    with pytest.raises(SpecError, match=r"--seed must be an integer >= 0"):
        spec.with_options(seed=-3)


# --------------------------------------------------------------------------- Panel and Model
def test_build_panel_and_model() -> None:
    spec = parse_spec(base_doc())
    frame = small_frame()
    panel = spec.build_panel(frame)
    model = spec.build_model(panel)
    assert panel.states == ("wear", "x0")
    assert model.anchor == "swap" and model.parameters == ("wear_cost", "swap_cost")
    assert spec.build_model(frame) == model
    res = oc.estimate(panel, model, **spec.estimate_options())
    assert list(res.params.index) == ["wear_cost", "swap_cost"]


def test_build_panel_names_the_key() -> None:
    doc = base_doc()
    doc["data"]["states"] = ["wear", "nope"]
    with pytest.raises(SpecError, match=r"data\.states: column 'nope' is not in the data; available columns: 'bike', 'week'"):
        parse_spec(doc).build_panel(small_frame())
    doc = base_doc()
    doc["utility"]["keep"]["wear_cost"] = "tear"
    with pytest.raises(SpecError, match=r"utility\.keep\.wear_cost: column 'tear'"):
        parse_spec(doc).build_model(small_frame())


@pytest.mark.parametrize("anchor", [1, "1"])
def test_integer_choice_labels(anchor: int | str) -> None:
    doc = base_doc()
    doc["model"]["anchor"] = anchor
    doc["utility"] = {"0": {"wear_cost": "wear_scaled"}, "1": {"swap_cost": "1"}}
    frame = small_frame(choices=(0, 1))
    spec = parse_spec(doc)
    panel = spec.build_panel(frame)
    for data in (frame, panel):
        model = spec.build_model(data)
        assert model.anchor == 1 and isinstance(model.anchor, int)
        assert set(model.utility) == {0, 1}
    oc.estimate(panel, spec.build_model(panel), **spec.estimate_options())


@pytest.mark.parametrize("anchor", [1, "1", "1.0"])
def test_integer_anchor_matches_float_labels(anchor: int | str) -> None:
    """The spec and the API share one matcher: anchor = 1 names the float label 1.0."""
    doc = base_doc()
    doc["model"]["anchor"] = anchor
    doc["utility"] = {"0": {"wear_cost": "wear_scaled"}, "1": {"swap_cost": "1"}}
    frame = small_frame(choices=(0, 1)).assign(action=lambda d: d["action"].astype(float))
    model = parse_spec(doc).build_model(frame)
    assert model.anchor == 1.0 and set(model.utility) == {0.0, 1.0}


def test_empty_utility_table_declares_a_choice_without_parameters(tmp_path: Path) -> None:
    doc = base_doc()
    doc["utility"] = {"keep": {}, "swap": {"swap_cost": "1", "wear_cost": "wear_scaled"}}
    write_spec(tmp_path / "s.toml", doc)
    assert "[utility.keep]\n\n[utility.swap]" in (tmp_path / "s.toml").read_text()
    spec = read_spec(tmp_path / "s.toml")
    model = spec.build_model(small_frame())
    assert dict(model.utility) == {"keep": {}, "swap": {"swap_cost": "1", "wear_cost": "wear_scaled"}}
    # Without the table the observed choice is undeclared: an error that says how to declare it.
    doc["utility"].pop("keep")
    with pytest.raises(SpecError, match=r"utility: observed choice\(s\) 'keep' \(\d+ rows\) .*add an "
                                        r"empty table \[utility\.keep\]"):
        parse_spec(doc).build_model(small_frame())


def test_choice_label_mismatch() -> None:
    doc = base_doc()
    doc["model"]["anchor"] = "replace"
    with pytest.raises(SpecError, match=r"model\.anchor: choice 'replace' is not among the choices observed in column 'action' \('keep', 'swap'\)"):
        parse_spec(doc).build_model(small_frame())
    doc = base_doc()
    doc["model"]["anchor"] = "swap"
    doc["utility"] = {"0": {"wear_cost": "wear_scaled"}}
    with pytest.raises(SpecError, match=r"model\.anchor: choice 'swap' is not among the choices observed.*\(0, 1\)"):
        parse_spec(doc).build_model(small_frame(choices=(0, 1)))
    doc["model"]["anchor"] = 1
    doc["utility"] = {"2": {"wear_cost": "wear_scaled"}}
    with pytest.raises(SpecError, match=r"utility\.2: choice '2'"):
        parse_spec(doc).build_model(small_frame(choices=(0, 1)))


# --------------------------------------------------------------------------- TOML writer
def test_dumps_toml_round_trip() -> None:
    doc = {
        "title": 'quote " backslash \\ tab \t newline \n bell \x07 é',
        "flag": False,
        "n": -3,
        "x": 1e-4,
        "big": 1e20,
        "items": ["a", "b"],
        "numbers": [1, 2.5],
        "table": {
            "key with space": "v",
            "1": "one",
            "nested": {"deep": True},
            "empty": {},
        },
        "only_tables": {"a": {"b": 1}},
        "skipped": None,
    }
    text = dumps_toml(doc, header="line one\nline two")
    assert text.startswith("# line one\n# line two\n")
    back = tomllib.loads(text)
    expected = {k: v for k, v in doc.items() if v is not None}
    assert back == expected
    assert "[only_tables]" not in text and "[only_tables.a]" in text
    assert "[table.empty]" in text


def test_dumps_toml_wraps_long_arrays() -> None:
    states = [f"x{i}" for i in range(40)]
    text = dumps_toml({"data": {"states": states}})
    assert max(len(line) for line in text.splitlines()) <= 88
    assert tomllib.loads(text)["data"]["states"] == states


@pytest.mark.parametrize("value", [float("nan"), float("inf")])
def test_dumps_toml_rejects_non_finite(value: float) -> None:
    with pytest.raises(ValueError, match="non-finite"):
        dumps_toml({"model": {"discount": value}})


def test_write_spec_round_trip(tmp_path: Path) -> None:
    doc = base_doc()
    doc["data"]["path"] = "panel.csv"
    doc["model"]["persistent"] = ["x0"]
    doc["inference"] = {"cov": "clustered", "small_sample": False}
    first = tmp_path / "a" / "spec.toml"
    write_spec(first, doc)
    spec = read_spec(first)
    # Writing the Spec elsewhere keeps the data path pointing at the same file.
    second = tmp_path / "b" / "c" / "copy.toml"
    write_spec(second, spec)
    again = read_spec(second)
    assert again.data.path is not None and spec.data.path is not None
    assert again.data.path.resolve() == spec.data.path.resolve()
    assert tomllib.loads(second.read_text())["data"]["path"] == "../../a/panel.csv"
    for part in ("model", "first_stage", "inference"):
        assert getattr(again, part) == getattr(spec, part)
    assert {k: dict(v) for k, v in again.utility.items()} == {k: dict(v) for k, v in spec.utility.items()}


# --------------------------------------------------------------------------- data files
def test_csv_round_trip(tmp_path: Path) -> None:
    frame = small_frame()
    path = write_data(frame, tmp_path / "sub" / "panel.csv")
    back = read_data(path)
    pd.testing.assert_frame_equal(back, frame, check_dtype=False)
    assert np.array_equal(back["x0"].to_numpy(), frame["x0"].to_numpy())  # exact floats


def test_data_file_errors(tmp_path: Path) -> None:
    with pytest.raises(FileNotFoundError, match="data file not found"):
        read_data(tmp_path / "nope.csv")
    with pytest.raises(oc.InputError, match=r"unsupported extension '\.xlsx'"):
        read_data(tmp_path / "panel.xlsx")
    empty = tmp_path / "empty.csv"
    empty.write_text("")
    with pytest.raises(oc.InputError, match="is empty"):
        read_data(empty)
    ragged = tmp_path / "ragged.csv"
    ragged.write_text("a,b\n1,2\n1,2,3,4\n")
    with pytest.raises(oc.InputError, match="could not parse CSV file"):
        read_data(ragged)


@pytest.mark.skipif(HAS_PYARROW, reason="pyarrow is installed")
def test_parquet_without_pyarrow(tmp_path: Path) -> None:
    with pytest.raises(oc.InputError, match=r"needs pyarrow.*pip install pyarrow"):
        write_data(small_frame(), tmp_path / "p.parquet")
    with pytest.raises(oc.InputError, match=r"reading the Parquet file"):
        read_data(tmp_path / "p.parquet")


@pytest.mark.skipif(not HAS_PYARROW, reason="pyarrow is not installed")
def test_parquet_round_trip(tmp_path: Path) -> None:  # pragma: no cover - needs pyarrow
    frame = small_frame()
    path = write_data(frame, tmp_path / "p.parquet")
    pd.testing.assert_frame_equal(read_data(path), frame, check_dtype=False)


def test_data_helpers() -> None:
    assert data_format("a/b.CSV") == "csv"
    assert data_format("b.csv.gz") == "csv"
    assert data_stem("dir/panel.csv.gz") == Path("dir/panel")
    assert data_stem("panel.parquet").with_suffix(".toml") == Path("panel.toml")
    assert re.fullmatch(r"csv|parquet", data_format("x.csv"))
    assert isinstance(parse_spec(base_doc()), Spec)


@pytest.mark.parametrize("suffix", [".csv", ".parquet"])
def test_read_panel_reads_only_the_columns_it_needs(small_ebike, tmp_path, suffix: str) -> None:  # type: ignore[no-untyped-def]
    """``read_data(columns=)`` reads the named columns in order (a repeat once), equal to the
    full file's; ``read_panel`` wraps them; a missing column is named with the file's."""
    if suffix == ".parquet":
        pytest.importorskip("pyarrow")
    sim = small_ebike
    frame = sim.data.assign(unused=np.arange(len(sim.data)), note="text")
    path = tmp_path / f"panel{suffix}"
    if suffix == ".csv":
        frame.to_csv(path, index=False)
    else:
        frame.to_parquet(path, index=False)
    states = ["wear", "x0", "x3"]
    got = read_data(path, columns=[sim.unit, sim.period, sim.choice, *states, "wear_scaled", sim.unit])
    assert list(got.columns) == [sim.unit, sim.period, sim.choice, *states, "wear_scaled"]
    pd.testing.assert_frame_equal(got, sim.data[list(got.columns)], check_exact=False, rtol=1e-15)
    panel = oc.read_panel(path, unit=sim.unit, period=sim.period, choice=sim.choice, states=states,
                       extra_columns=["wear_scaled"])
    full = oc.Panel(sim.data, unit=sim.unit, period=sim.period, choice=sim.choice, states=states)
    # Parquet stores the doubles; CSV text parsed by pandas' default parser is within 1 ulp.
    np.testing.assert_allclose(panel.features, full.features, rtol=0 if suffix == ".parquet" else 1e-15)
    assert "unused" not in panel.frame.columns
    pd.testing.assert_frame_equal(read_data(path)[list(got.columns)], got)
    with pytest.raises(oc.InputError, match=r"column\(s\) 'nope' are not in .*the file has: bike"):
        read_data(path, columns=["bike", "nope"])
