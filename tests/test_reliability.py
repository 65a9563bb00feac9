"""Reliability: bad input gets a clear error, nothing is lost silently, results are reproducible.

One table of bad inputs, checked through the Python API (``pytest.raises(match=...)``) and,
where the input can be written as files, through ``orthoccp estimate`` (exit code 2 and one
``orthoccp: error:`` line, never a traceback). Then the numerical guards (clipped
probabilities, units that dominate the variance, failed Newton solves), the
``missing="drop"`` option with its row counts, and determinism (same seed, same JSON; LightGBM
with 1 or 2 threads, same numbers).
"""

from __future__ import annotations

import dataclasses
import json
import re
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field
from decimal import Decimal
from functools import lru_cache
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

import orthoccp as oc
from orthoccp.cli import main
from orthoccp.guards import dominant_units
from orthoccp.simulate import simulate
from orthoccp.spec import write_spec

STATES = ["wear", "x0", "x1", "x2", "x3", "x4"]
UTILITY = {"keep": {"wear_cost": "wear_scaled"}, "swap": {"swap_cost": "1"}}


@lru_cache(maxsize=None)
def _base_frame() -> pd.DataFrame:
    """60 simulated e-bikes x 6 weeks (invented scenario; mechanics only)."""
    return simulate("ebike", units=60, periods=6, seed=1, n_covariates=5).data


def base() -> pd.DataFrame:
    return _base_frame().copy()


def base_doc() -> dict[str, Any]:
    return {
        "data": {"unit": "bike", "period": "week", "choice": "action", "states": list(STATES)},
        "model": {"kind": "renewal", "anchor": "swap", "discount": 0.95},
        "utility": {c: dict(p) for c, p in UTILITY.items()},
        "first_stage": {"learner": "logit", "folds": 3, "seed": 0},
    }


# --------------------------------------------------------------------------- bad learners
class NoProba:
    def fit(self, X, y):  # type: ignore[no-untyped-def]
        return self

    def get_params(self, deep=True):  # type: ignore[no-untyped-def]
        return {}


class FixedProba:
    """A classifier whose predict_proba returns ``values`` (broadcast to the rows)."""

    def __init__(self, values: Any = (0.5, 0.5), classes: Any = None) -> None:
        self.values = values
        self.classes = classes

    def get_params(self, deep: bool = True) -> dict[str, Any]:
        return {"values": self.values, "classes": self.classes}

    def set_params(self, **params: Any) -> FixedProba:
        for k, v in params.items():
            setattr(self, k, v)
        return self

    def fit(self, X: np.ndarray, y: np.ndarray) -> FixedProba:
        self.classes_ = np.unique(y) if self.classes is None else np.asarray(self.classes)
        return self

    def predict_proba(self, X: np.ndarray) -> np.ndarray:
        v = np.asarray(self.values, dtype=float)
        if v.ndim == 0:
            return np.full(X.shape[0], float(v))
        return np.tile(v, (X.shape[0], 1))


# --------------------------------------------------------------------------- the table
def _set(column: str, row: int, value: Any) -> Callable[[pd.DataFrame], pd.DataFrame]:
    def edit(d: pd.DataFrame) -> pd.DataFrame:
        if not isinstance(value, (int, float)) or isinstance(value, bool):
            d[column] = d[column].astype(object)
        elif d[column].dtype.kind in "iub":
            d[column] = d[column].astype(float)
        d.loc[row, column] = value
        return d

    return edit


def _units(k: int) -> Callable[[pd.DataFrame], pd.DataFrame]:
    """The first k units (each of the first 6 has at least one swap)."""
    return lambda d: d[d["bike"] < k].reset_index(drop=True)


def _respell(label: str, spelling: str, *, units: int = 0, rows: int = 0) -> Callable[[pd.DataFrame], pd.DataFrame]:
    """``label`` written as ``spelling`` in the first ``units`` units, or in its first ``rows`` rows."""
    def edit(d: pd.DataFrame) -> pd.DataFrame:
        hit = (d["action"] == label) & (d["bike"] < units if units else True)
        if rows:
            hit &= hit.cumsum() <= rows
        d.loc[hit, "action"] = spelling
        return d

    return edit


def _swap_in_one_unit(d: pd.DataFrame) -> pd.DataFrame:
    d["action"] = "keep"
    d.loc[1, "action"] = "swap"
    return d


@dataclass
class Case:
    """A bad input: how to make it, and what the API and the command line must say.

    ``frame`` edits the base frame; ``panel``, ``model`` and ``options`` override the Panel,
    Model and estimate arguments. ``cli`` says whether the case can be written as files; its
    spec document is the base spec with ``doc`` applied (by default: the same overrides).
    """

    match: str
    frame: Callable[[pd.DataFrame], pd.DataFrame] = lambda d: d
    panel: dict[str, Any] = field(default_factory=dict)
    model: dict[str, Any] = field(default_factory=dict)
    options: dict[str, Any] = field(default_factory=dict)
    exception: type[Exception] = oc.InputError
    cli: bool = True
    doc: Callable[[dict[str, Any]], None] | None = None
    cli_match: str | None = None
    api: bool = True
    call: str = "estimate"  # or "fold_stability" (API only)
    after: Callable[[oc.Results], Any] | None = None  # a call on the results (API only)


def _doc_from(case: Case) -> dict[str, Any]:
    doc = base_doc()
    if case.doc is not None:
        case.doc(doc)
        return doc
    for key, value in case.panel.items():
        doc["data"][key] = value
    for key, value in case.model.items():
        if key == "utility":
            doc["utility"] = value
        else:
            doc["model"][key] = value
    for key, value in case.options.items():
        doc["first_stage"][key] = value
    return doc


def _edit_doc(table: str, key: str, value: Any) -> Callable[[dict[str, Any]], None]:
    def edit(doc: dict[str, Any]) -> None:
        doc.setdefault(table, {})[key] = value

    return edit


DUP_COLUMNS = lambda d: pd.concat([d, d[["x0"]]], axis=1)  # noqa: E731

BAD: dict[str, Case] = {
    # rows and periods
    "duplicated unit-period rows": Case(
        r"2 rows share a unit and period \(e\.g\. bike=\d+, week=\d+\)",
        frame=lambda d: pd.concat([d, d.iloc[[7]]], ignore_index=True),
    ),
    "missing unit label": Case(r"'bike' column has 1 missing values", frame=_set("bike", 3, np.nan)),
    "missing period": Case(
        r"period column 'week' must hold whole numbers; found 1 missing", frame=_set("week", 3, np.nan)
    ),
    "non-integer period": Case(r"whole numbers; found 0\.5", frame=_set("week", 0, 0.5)),
    "text period": Case(r"period column 'week' must hold integers, got dtype", frame=_set("week", 0, "w1")),
    "period too large": Case(
        r"period column 'week' holds values too large", frame=lambda d: d.assign(week=d["week"] * 10**17)
    ),
    # choices
    "utility choice never observed": Case(
        r"utility choice 'stop' is not among the choices observed",
        model={"utility": {**UTILITY, "stop": {"stop_cost": "1"}}},
        cli_match=r"utility\.stop: choice 'stop' is not among the choices",
    ),
    "choice observed in one fold only": Case(
        r"choice\(s\) 'swap' never occur in the training rows of fold", frame=_swap_in_one_unit
    ),
    "anchor never chosen": Case(
        r"anchor 'swap' is not among the choices observed.*'fix', 'keep'",
        frame=lambda d: d.assign(action=d["action"].replace({"swap": "fix"})),
        cli_match=r"model\.anchor: choice 'swap' is not among the choices",
    ),
    "one choice only": Case(r"only one choice \('keep'\)", frame=lambda d: d.assign(action="keep"),
                            model={"anchor": "keep", "utility": {"keep": {"c": "wear_scaled"}}}),
    # states
    "state with NaN": Case(r"state column 'x0' has 1 missing or infinite values", frame=_set("x0", 2, np.nan)),
    "state with infinity": Case(r"state column 'x1' has 1 missing or infinite values", frame=_set("x1", 4, np.inf)),
    "text in a numeric state": Case(r"state column 'x0' .*text such as 'high'", frame=_set("x0", 5, "high")),
    "numbers stored as text": Case(
        r"state column 'x0' holds numbers stored as text",
        frame=lambda d: d.assign(x0=d["x0"].astype(str)),
        cli=False,  # a CSV file has no types: the numbers are read as numbers
    ),
    "complex state": Case(r"state column 'x0' holds complex numbers",
                          frame=lambda d: d.assign(x0=d["x0"] + 1j), cli=False),
    "state not in the data": Case(
        r"state column 'mileage' is not in the data", panel={"states": [*STATES, "mileage"]},
        cli_match=r"data\.states: column 'mileage' is not in the data",
    ),
    # utilities and identification
    "constant utility column": Case(
        r"parameter\(s\) 'swap_cost' not identified.*constant or collinear",
        frame=lambda d: d.assign(wear_scaled=1.0),
    ),
    "collinear utility columns": Case(
        r"parameter\(s\) '(wear|w2)_cost' not identified.*collinear",
        frame=lambda d: d.assign(w2=2 * d["wear_scaled"]),
        model={"utility": {"keep": {"wear_cost": "wear_scaled", "w2_cost": "w2"}, "swap": {"swap_cost": "1"}}},
    ),
    "utility column with NaN": Case(
        r"utility column 'wear_scaled' has 1 missing or infinite values", frame=_set("wear_scaled", 1, np.nan)
    ),
    "text in a utility column": Case(
        r"utility column 'wear_scaled' must be numeric", frame=_set("wear_scaled", 1, "a lot")
    ),
    "same parameter under every choice": Case(
        r"not identified: the regressor is the same for every choice",
        model={"utility": {"keep": {"both": "1"}, "swap": {"both": "1"}}},
    ),
    # model options
    "discount 1": Case(r"discount must be in \[0, 1\)", model={"discount": 1.0},
                       cli_match=r"model\.discount must be in \[0, 1\).*got 1\.0"),
    "discount negative": Case(r"discount must be in \[0, 1\)", model={"discount": -0.1},
                              cli_match=r"model\.discount must be in \[0, 1\)"),
    "discount NaN": Case(r"discount must be in \[0, 1\)", model={"discount": float("nan")}, cli=False),
    "unknown model kind": Case(r"kind must be 'renewal' or 'terminal'", model={"kind": "finite"},
                               cli_match=r"model\.kind must be one of 'renewal', 'terminal', got 'finite'"),
    # units and folds
    "fewer units than folds": Case(
        r"folds=5 but the data have only 4 unit\(s\)", frame=_units(4), options={"folds": 5}
    ),
    "a single unit": Case(r"folds=3 but the data have only 1 unit\(s\)", frame=_units(1)),
    "a single unit, static model": Case(
        r"at least two clusters", frame=_units(1), model={"discount": 0.0}
    ),
    "nested scheme with 2 folds": Case(r"scheme='nested' needs folds >= 3", options={"folds": 2, "scheme": "nested"}),
    # learners (Python objects: API only)
    "learner without predict_proba": Case(r"has no predict_proba\(\) method", options={"learner": NoProba()}, cli=False),
    "learner class, not instance": Case(
        r"learner FixedProba is a class; pass an instance", options={"learner": FixedProba}, cli=False
    ),
    "probabilities outside [0, 1]": Case(
        r"FixedProba\.predict_proba returned values outside \[0, 1\]",
        options={"learner": FixedProba((1.5, -0.5)), "regressor": "logit"}, cli=False,
    ),
    "probabilities not summing to 1": Case(
        r"rows do not sum to 1 \(largest deviation 0\.2\)",
        options={"learner": FixedProba((0.4, 0.4)), "regressor": "logit"}, cli=False,
    ),
    "NaN probabilities": Case(
        r"returned \d+ non-finite values \(NaN or infinite\)",
        options={"learner": FixedProba((np.nan, 0.5)), "regressor": "logit", "scheme": "plain"}, cli=False,
    ),
    "one-dimensional probabilities": Case(
        r"predict_proba returned an array of shape \(\d+,\); expected one row per observation",
        options={"learner": FixedProba(0.5), "regressor": "logit"}, cli=False,
    ),
    "classes_ that are not choice codes": Case(
        r"classes_ is \['keep', 'swap'\]; it must list distinct choice codes in 0\.\.1",
        options={"learner": FixedProba(classes=["keep", "swap"]), "regressor": "logit"}, cli=False,
    ),
    "unknown learner name": Case(
        r"learner must be one of 'lightgbm', 'logit'.*, got 'xgb'; from Python, a scikit-learn-style "
        r"classifier also works", options={"learner": "xgb"},
        cli_match=r"first_stage\.learner must be one of 'lightgbm', 'logit'",
    ),
    # option types (API) and spec keys and types (CLI)
    "folds of the wrong type": Case(
        r"folds must be an integer >= 2, got '3'", options={"folds": "3"},
        cli_match=r"first_stage\.folds must be an integer >= 2, got '3' \(string\)",
    ),
    "debias of the wrong type": Case(
        r"debias must be true or false, got 'no' \(string\)", options={"debias": "no"},
        doc=_edit_doc("inference", "debias", "no"), cli_match=r"inference\.debias must be true or false",
    ),
    "small_sample of the wrong type": Case(
        r"small_sample must be true or false, got 1 \(integer\)", options={"small_sample": 1},
        doc=_edit_doc("inference", "small_sample", 1), cli_match=r"inference\.small_sample must be true or false",
    ),
    "unknown covariance": Case(
        r"cov 'robust' is unknown; valid names: clustered, heteroskedastic", options={"cov": "robust"},
        doc=_edit_doc("inference", "cov", "robust"), cli_match=r"inference\.cov must be one of 'clustered'",
    ),
    "discount as text": Case(r"discount must be a number in \[0, 1\), got '0\.95'", model={"discount": "0.95"},
                             cli_match=r"model\.discount must be a number"),
    "states of the wrong type": Case(r"states must be a list of column names, got NoneType", panel={"states": None}, cli=False),
    "states as a number (spec)": Case(
        r"", api=False, doc=_edit_doc("data", "states", 3),
        cli_match=r"data\.states must be an array of strings, got 3 \(integer\)",
    ),
    "utility column of the wrong type": Case(
        r"utility\['keep'\]\['wear_cost'\] must be a column name",
        model={"utility": {"keep": {"wear_cost": 3}, "swap": {"swap_cost": "1"}}},
        cli_match=r"utility\.keep\.wear_cost must be a string, got 3 \(integer\)",
    ),
    "unknown option": Case(r"unexpected keyword argument 'foldz'", options={"foldz": 3}, exception=TypeError,
                           cli_match=r"unknown key 'foldz' in \[first_stage\]; valid keys: learner"),
    "unknown spec table": Case(r"", api=False, doc=_edit_doc("first_stages", "folds", 3),
                               cli_match=r"unknown table or key 'first_stages' at the top level"),
    "missing option unknown": Case(
        r"missing must be 'error' or 'drop', got 'maybe'", panel={"missing": "maybe"},
        cli_match=r"data\.missing must be one of 'error', 'drop', got 'maybe'",
    ),
    # frames only Python can make
    "duplicated column names": Case(r"state column 'x0' appears 2 times", frame=DUP_COLUMNS, cli=False),
    "hierarchical columns": Case(
        r"MultiIndex", frame=lambda d: d.set_axis(pd.MultiIndex.from_tuples([(c, "") for c in d.columns]), axis=1),
        cli=False,
    ),
    "unit labels of mixed types": Case(
        r"unit column 'bike' mixes label types",
        frame=lambda d: d.assign(bike=d["bike"].astype(object).where(d["bike"] % 2 == 0, "u" + d["bike"].astype(str))),
        cli=False,  # a CSV column is read as one type
    ),
    "choice labels of mixed types": Case(
        r"choice column 'action' mixes label types",
        frame=lambda d: d.assign(action=d["action"].astype(object).where(d["action"] == "keep", 1)), cli=False,
    ),
    # labels: every observed choice declared, matched exactly (issue 21, items 1 and 3)
    "choice label with a trailing space": Case(
        r"column 'action' spells a choice two ways: 'keep' \(\d+ rows\) and 'keep ' \(\d+ rows\)",
        frame=_respell("keep", "keep ", units=20),
    ),
    "choice label with a trailing space, 5 rows": Case(
        r"column 'action' spells a choice two ways: 'keep' \(\d+ rows\) and 'keep ' \(5 rows\)",
        frame=_respell("keep", "keep ", rows=5),
    ),
    "choice label differing by case": Case(
        r"spells a choice two ways: 'swap' \(\d+ rows\) and 'Swap' \(\d+ rows\)",
        frame=_respell("swap", "Swap", units=20),
    ),
    "observed choice not in the utility": Case(
        r"observed choice\(s\) 'fix' \(5 rows\) in column 'action' are not declared.*'fix': \{\}",
        frame=_respell("keep", "fix", rows=5),
        cli_match=r"utility: observed choice\(s\) 'fix' \(5 rows\).*add an empty table \[utility\.fix\]",
    ),
    "choice without parameters left out": Case(
        r"observed choice\(s\) 'keep' \(\d+ rows\) in column 'action' are not declared",
        model={"utility": {"swap": {"swap_cost": "1", "wear_cost": "wear_scaled"}}},
    ),
    "two keys for the same choice": Case(
        r"two keys for the same choice: utility choice 0 and '0' both name 0",
        frame=lambda d: d.assign(action=(d["action"] == "swap").astype(int)),
        model={"anchor": 1, "utility": {0: {"wear_cost": "wear_scaled"}, "0": {}, 1: {"swap_cost": "1"}}},
        doc=lambda doc: doc.update(model={**doc["model"], "anchor": 1}, utility={
            "0": {"wear_cost": "wear_scaled"}, "0.0": {}, "1": {"swap_cost": "1"}}),
        cli_match=r"two keys for the same choice: \[utility\.0\] and \[utility\.\"0\.0\"\] both name 0",
    ),
    "state named like an indicator column": Case(
        r"state 'x0=hi' is named like an indicator column of the categorical state 'x0'",
        frame=lambda d: d.assign(x0=np.where(d["x0"] > 0, "hi", "lo"), **{"x0=hi": d["x1"]}),
        panel={"states": [*STATES, "x0=hi"]}, model={"persistent": ["x0"]},
    ),
    "data column named like the constant": Case(
        r"utility\['swap'\]\['swap_cost'\]: the data have a column named '1'.*rename that column",
        frame=lambda d: d.assign(**{"1": d["x1"]}),
    ),
    "labels print as plain values": Case(
        r"row\(s\) choose the terminal anchor 'swap' but the unit has later rows \(e\.g\. bike=\d+, week=\d+\)",
        model={"kind": "terminal"},
    ),
    # messages that name the real cause (issue 21, item 9)
    "state near 1e300": Case(
        r"state column 'x1' holds values as large as 1e\+300, too large for the learners",
        frame=lambda d: d.assign(x1=np.sign(d["x1"]) * 1e300),
    ),
    "utility column scaled by 1e200": Case(
        r"utility column\(s\) 'wear_scaled' of parameter 'wear_cost' have an extreme scale",
        frame=lambda d: d.assign(wear_scaled=d["wear_scaled"] * 1e200),
    ),
    "utility column scaled by 1e-200": Case(
        r"utility column\(s\) 'wear_scaled' of parameter 'wear_cost' have an extreme scale",
        frame=lambda d: d.assign(wear_scaled=d["wear_scaled"] * 1e-200),
    ),
    "fold_stability, nested scheme with 2 folds": Case(
        r"scheme='nested' needs folds >= 3", options={"folds": 2, "scheme": "nested"},
        call="fold_stability", cli=False,
    ),
    "header with a leading space": Case(
        r"period column 'week' is not in the data; available columns: 'bike', ' week'.*The data "
        r"have ' week', which differs from 'week' only by case or surrounding whitespace",
        frame=lambda d: d.rename(columns={"week": " week"}),
        cli_match=r"data\.period: column 'week' is not in the data; available columns: 'bike', ' week'",
    ),
    "utility column not in the data": Case(
        r"utility column 'mileage' is not in the data; available columns: 'bike', 'week'",
        model={"utility": {"keep": {"wear_cost": "mileage"}, "swap": {"swap_cost": "1"}}},
        cli_match=r"utility\.keep\.wear_cost: column 'mileage' is not in the data; available columns: 'bike'",
    ),
    "renewed state declared persistent": Case(
        r"persistent state 'wear' is reset by the renewal .*Remove 'wear' from persistent",
        model={"persistent": ["wear"]},
    ),
    "no rows": Case(r"data has no rows", frame=lambda d: d.iloc[0:0]),
    "every row dropped": Case(
        r"missing='drop' dropped all 360 rows", frame=lambda d: d.assign(x0=np.nan), panel={"missing": "drop"}
    ),
}


def _identifier_state(d: pd.DataFrame) -> pd.DataFrame:
    """Three copies of the panel (1,080 rows), with a text state that differs in every row."""
    d = pd.concat([d.assign(bike=d["bike"] + 1000 * k) for k in range(3)], ignore_index=True)
    return d.assign(x0=[f"r{i:04d}" for i in range(len(d))])


def _classifier() -> Any:
    from sklearn.linear_model import LogisticRegression

    return LogisticRegression()


# Issue 21 (round two), items 7, 8: sizes, option types, calls on the results.
BAD |= {
    "persistent None": Case(
        r"persistent must be a list of state names \(e\.g\. persistent=\['x0'\]; \[\] for none\), "
        r"got NoneType None", model={"persistent": None}, cli=False,  # TOML has no null
    ),
    "persistent a number": Case(
        r"persistent must be a list of state names .*got int 5", model={"persistent": 5},
        cli_match=r"model\.persistent must be an array of strings, got 5 \(integer\)",
    ),
    "persistent holding a number": Case(
        r"persistent must list state names as strings, got 5 \(int\)", model={"persistent": ["x0", 5]},
        cli_match=r"model\.persistent must be an array of non-empty strings; element 5",
    ),
    "classifier as the regressor": Case(
        r"regressor LogisticRegression is a classifier; the regressor must be a regressor with "
        r"fit/predict for continuous targets", options={"regressor": _classifier()}, cli=False,
    ),
    "text state with a value per row": Case(
        r"state column 'x0' has 1,080 distinct text or categorical values, which would become "
        r"1,080 indicator columns \(the limit is 1,000\)", frame=_identifier_state,
    ),
    "conf_int level as text": Case(
        r"level must be a number in \(0, 1\) such as 0\.95, got '0\.9' \(str\)",
        after=lambda res: res.conf_int(level="0.9"), cli=False,
    ),
    "conf_int level None": Case(
        r"level must be a number in \(0, 1\) such as 0\.95, got None \(NoneType\)",
        after=lambda res: res.conf_int(level=None), cli=False,
    ),
    "summary level 95": Case(r"level must be a number in \(0, 1\)", after=lambda res: res.summary(95), cli=False),
    "write_report to a folder": Case(
        r"path '\.' is a folder; give a file name inside it", after=lambda res: oc.write_report(res, "."),
        cli=False,
    ),
}


def _api_call(case: Case) -> None:
    frame = case.frame(base())
    panel_kw = dict(unit="bike", period="week", choice="action", states=list(STATES))
    panel_kw.update(case.panel)
    model_kw: dict[str, Any] = dict(anchor="swap", kind="renewal", discount=0.95, utility=UTILITY)
    model_kw.update(case.model)
    options: dict[str, Any] = dict(learner="logit", folds=3, seed=0)
    options.update(case.options)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        panel = oc.Panel(frame, **panel_kw)
        model = oc.Model(**model_kw)
        res = getattr(oc, case.call)(panel, model, **options)
    if case.after is not None:
        case.after(res)


API_CASES = [(k, c) for k, c in BAD.items() if c.api]
CLI_CASES = [(k, c) for k, c in BAD.items() if c.cli]


@pytest.mark.parametrize("case", [c for _, c in API_CASES], ids=[k for k, _ in API_CASES])
def test_bad_input_api(case: Case) -> None:
    with pytest.raises(case.exception, match=case.match):
        _api_call(case)


def assert_error_line(err: str, fragment: str) -> None:
    """stderr holds warnings (if any) and then exactly one error line; no traceback."""
    assert "Traceback" not in err, err
    lines = err.strip().splitlines()
    assert lines and all(line.startswith("orthoccp: ") for line in lines), err
    errors = [line for line in lines if line.startswith("orthoccp: error: ")]
    assert len(errors) == 1 and errors[0] == lines[-1], err
    assert re.search(fragment, errors[0]), f"{fragment!r} not in {errors[0]!r}"


@pytest.mark.parametrize("case", [c for _, c in CLI_CASES], ids=[k for k, _ in CLI_CASES])
def test_bad_input_cli(case: Case, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    data = tmp_path / "panel.csv"
    spec = tmp_path / "panel.toml"
    case.frame(base()).to_csv(data, index=False)
    write_spec(spec, _doc_from(case))
    assert main(["estimate", str(data), "--spec", str(spec)]) == 2
    captured = capsys.readouterr()
    assert_error_line(captured.err, case.cli_match if case.cli_match is not None else case.match)
    assert captured.out == ""


@pytest.mark.parametrize(
    ("content", "fragment"),
    [
        (b"", r"panel\.csv' is empty"),
        (b"bike,week,action,wear,wear_scaled,x0,x1,x2,x3,x4\n", r"panel\.csv: data has no rows"),
        (b"\xff\xfe\x00b\x00i\x00k\x00e\xff\n\x80\x81", r"not UTF-8 text|could not"),
        (b'bike,week\n1,"2\n', r"could not parse CSV file|not in the data"),
    ],
    ids=["empty file", "header only", "not UTF-8", "broken quoting"],
)
def test_unreadable_data_files(content: bytes, fragment: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    data = tmp_path / "panel.csv"
    data.write_bytes(content)
    write_spec(tmp_path / "panel.toml", base_doc())
    assert main(["estimate", str(data), "--spec", str(tmp_path / "panel.toml")]) == 2
    assert_error_line(capsys.readouterr().err, fragment)


@pytest.mark.parametrize(
    ("text", "fragment"),
    [("[data\nunit = 1", r"not valid TOML"), ("\udcff", r"not valid TOML: the file is not UTF-8")],
    ids=["broken TOML", "not UTF-8"],
)
def test_unreadable_spec_files(text: str, fragment: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    spec = tmp_path / "panel.toml"
    spec.write_bytes(text.encode("utf-8", errors="surrogateescape"))
    base().to_csv(tmp_path / "panel.csv", index=False)
    assert main(["estimate", str(tmp_path / "panel.csv"), "--spec", str(spec)]) == 2
    assert_error_line(capsys.readouterr().err, fragment)


# --------------------------------------------------------------------------- unusual inputs that run
def _fit_params(frame: pd.DataFrame, **model: Any) -> pd.Series:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        panel = oc.Panel(frame, unit="bike", period="week", choice="action", states=STATES)
        spec: dict[str, Any] = dict(anchor="swap", kind="renewal", discount=0.95, utility=UTILITY)
        spec.update(model)
        return oc.estimate(panel, oc.Model(**spec), learner="logit", folds=3, seed=0).params


def _as_objects(column: str, convert: Callable[[Any], Any]) -> Callable[[pd.DataFrame], pd.DataFrame]:
    return lambda d: d.assign(**{column: pd.Series([convert(v) for v in d[column]], dtype=object)})


@pytest.mark.parametrize(
    ("column", "convert"),
    [("x2", lambda v: bool(v > 0)), ("x1", lambda v: Decimal(repr(v)))],
    ids=["booleans as objects", "Decimal"],
)
def test_object_columns_of_numbers_are_numbers(column: str, convert: Callable[[Any], Any]) -> None:
    """An object column of True/False is 0/1, one of Decimals their floats: the same features
    as the numeric column, and the estimation runs."""
    numeric = base().assign(**{column: [float(convert(v)) for v in base()[column]]})
    objects = numeric.assign(**{column: pd.Series([convert(v) for v in base()[column]], dtype=object)})
    kw: dict[str, Any] = dict(unit="bike", period="week", choice="action", states=STATES)
    got, want = oc.Panel(objects, **kw), oc.Panel(numeric, **kw)
    assert got.feature_names == want.feature_names
    np.testing.assert_array_equal(got.features, want.features)
    assert np.isfinite(_fit_params(objects)).all()


def test_numeric_labels_match_across_types() -> None:
    """Float labels 0.0/1.0: integer and text keys give the estimate of exact float keys."""
    frame = base().assign(action=(base()["action"] == "swap").astype(float))
    exact = _fit_params(frame, anchor=1.0, utility={0.0: UTILITY["keep"], 1.0: UTILITY["swap"]})
    other = _fit_params(frame, anchor=1, utility={0: UTILITY["keep"], "1": UTILITY["swap"]})
    pd.testing.assert_series_equal(other, exact, check_exact=True)


def test_spec_with_byte_order_mark_and_integer_anchor_runs(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """A spec saved with a UTF-8 byte-order mark, with anchor = 1 and [utility.1] for the float
    labels 0.0/1.0, gives the JSON of the plain spec that spells the labels "0.0" and "1.0"."""
    frame = base().assign(action=(base()["action"] == "swap").astype(float))
    frame.to_csv(tmp_path / "panel.csv", index=False)
    doc = base_doc()
    doc["model"]["anchor"] = "1.0"
    doc["utility"] = {"0.0": UTILITY["keep"], "1.0": UTILITY["swap"]}
    write_spec(tmp_path / "plain.toml", doc)
    doc["model"]["anchor"] = 1
    doc["utility"] = {"0": UTILITY["keep"], "1": UTILITY["swap"]}
    write_spec(tmp_path / "bom.toml", doc)
    (tmp_path / "bom.toml").write_bytes(b"\xef\xbb\xbf" + (tmp_path / "bom.toml").read_bytes())
    runs = {}
    for name in ("plain", "bom"):
        out = tmp_path / f"{name}.json"
        argv = ["estimate", str(tmp_path / "panel.csv"), "--spec", str(tmp_path / f"{name}.toml"), "--json", str(out)]
        assert main(argv) == 0
        runs[name] = json.loads(out.read_text())["params"]
    assert "Traceback" not in capsys.readouterr().err
    assert runs["bom"] == runs["plain"]


def test_discrete_estimator_message_names_what_a_spec_can_do(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """A regressor without a value at unvisited states: the spec can name the state column."""
    from orthoccp.reference import simulate_bus

    simulate_bus(buses=3, periods=20, seed=1).to_csv(tmp_path / "bus.csv", index=False)
    write_spec(tmp_path / "bus.toml", {
        "data": {"unit": "bus", "period": "month", "choice": "action", "states": ["mileage"]},
        "model": {"discount": 0.975},
        "utility": {"keep": {"theta11": "neg_mileage_k"}, "replace": {"replace_cost": "1"}},
        "estimator": {"method": "npl", "n_states": 175, "transitions": "increments",
                      "reset_choices": ["replace"]},
    })
    assert main(["estimate", str(tmp_path / "bus.csv"), "--spec", str(tmp_path / "bus.toml")]) == 2
    assert_error_line(capsys.readouterr().err,
                      r"column 'neg_mileage_k' gives no value at the \d+ of 175 states that no row "
                      r"occupies\. Use a state column itself as the regressor \('mileage'.*"
                      r"theta11 = \"mileage\" under \[utility\.keep\]")


# --------------------------------------------------------------------------- outputs before the work
class _WorkStarted(Exception):
    """Raised by the stand-ins of the estimators: the command started work before failing."""


def _no_work(*args: Any, **kwargs: Any) -> Any:
    raise _WorkStarted("the estimation started before the outputs were checked")


# (arguments after the files are written, the error the command must print). In the arguments,
# {data}, {spec} and {tmp} name the data file, the spec file and the test's folder.
EST = ["estimate", "{data}", "--spec", "{spec}"]
MC = ["montecarlo", "ebike", "--reps", "2", "--out", "{tmp}/a.json"]
OUTPUT_CASES: dict[str, tuple[list[str], str]] = {
    "estimate --json is a folder": ([*EST, "--json", "{tmp}"],
                                    r"--json '.*' is a folder; give a file name inside it"),
    "estimate --latex a system file that refuses writes": ([*EST, "--latex", "/proc/version"],
                                    r"--latex '/proc/version' cannot be written \(.+\); choose another path"),
    "estimate --json below a file": ([*EST, "--json", "{data}/res.json"],
                                    r"--json '.*res\.json' cannot be created: '.*panel\.csv' is a file, not a folder"),
    "estimate --json over the data file": ([*EST, "--json", "{data}"],
                                    r"--json '.*panel\.csv' is the same file as the input data file"),
    "estimate --json over the spec file": ([*EST, "--json", "{spec}"],
                                    r"--json '.*panel\.toml' is the same file as the input --spec"),
    "estimate --json and --latex on one file": ([*EST, "--json", "{tmp}/out.txt", "--latex", "{tmp}/out.txt"],
                                    r"--latex '.*out\.txt' is the same file as --json '.*out\.txt'; one would overwrite the other"),
    "estimate --json and --latex both on stdout": ([*EST, "--json", "-", "--latex", "-"],
                                    r"--json - and --latex - both write to stdout"),
    "compare --html is a folder": (["compare", *EST[1:], "--html", "{tmp}"],
                                    r"--html '.*' is a folder"),
    "report --out a folder named .html": (["report", *EST[1:], "--out", "{tmp}/sub.html"],
                                    r"--out '.*sub\.html' is a folder"),
    "montecarlo --replications over the summary CSV": ([*MC, "--replications", "{tmp}/a.csv"],
                                    r"--replications '.*a\.csv' is the same file as the summary CSV written beside --out"),
    "montecarlo --plot over --out": ([*MC, "--plot", "{tmp}/a.json"],
                                    r"--plot '.*a\.json' is the same file as --out"),
    "montecarlo --reps beyond the ceiling": (["montecarlo", "ebike", "--reps", "10000000", "--out", "{tmp}/a.json"],
                                    r"--reps 10,000,000 exceeds the ceiling of 100,000 replications per run"),
    "simulate --out below a file": (["simulate", "ebike", "--out", "{data}/sim.csv"],
                                    r"--out '.*sim\.csv' cannot be created: '.*panel\.csv' is a file, not a folder"),
    "a .csv.gz data file that is not gzip": (["estimate", "{tmp}/plain.csv.gz", "--spec", "{spec}"],
                                    r"could not read CSV file '.*plain\.csv\.gz': .*is the file really compressed that way"),
}


@pytest.mark.parametrize(("argv", "fragment"), list(OUTPUT_CASES.values()), ids=list(OUTPUT_CASES))
def test_outputs_checked_before_any_work(
    argv: list[str], fragment: str, tmp_path: Path, capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """Issue 21, items 5 and 6: a bad output path fails before any estimation, naming the path."""
    import orthoccp.montecarlo
    import orthoccp.simulate

    if "/proc/version" in argv and not Path("/proc/version").is_file():
        pytest.skip("no /proc/version on this system")
    for module, name in ((oc, "estimate"), (oc, "compare"), (oc, "estimate_discrete"),
                         (orthoccp.montecarlo, "run_montecarlo"), (orthoccp.simulate, "simulate")):
        monkeypatch.setattr(module, name, _no_work)
    data, spec = tmp_path / "panel.csv", tmp_path / "panel.toml"
    base().to_csv(data, index=False)
    base().to_csv(tmp_path / "plain.csv.gz", index=False, compression=None)
    write_spec(spec, base_doc())
    (tmp_path / "sub.html").mkdir()
    names = {"data": str(data), "spec": str(spec), "tmp": str(tmp_path)}
    assert main([a.format(**names) for a in argv]) == 2
    captured = capsys.readouterr()
    assert_error_line(captured.err, fragment)
    assert not (tmp_path / "a.json").exists() and not (tmp_path / "out.txt").exists()


def test_io_errors_while_writing_name_the_file(tmp_path: Path) -> None:
    """An OSError without a file name (a device that refuses writes: errno 5) gets the path."""
    from orthoccp._outputs import writing

    target = tmp_path / "res.json"
    with pytest.raises(OSError) as info:
        with writing(target):
            raise OSError(5, "Input/output error")
    assert info.value.errno == 5 and info.value.filename == str(target)
    assert "could not write the file (Input/output error)" in str(info.value)
    with pytest.raises(oc.InputError, match=r"could not write '.*res\.json': Not a gzipped file"):
        with writing(target):
            raise OSError("Not a gzipped file")


def test_ctrl_c_while_the_command_starts(monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    """Issue 21, item 8: Ctrl-C while the package is imported exits 130 with one line."""
    import importlib

    import orthoccp_entry

    def interrupted(name: str) -> Any:
        raise KeyboardInterrupt

    monkeypatch.setattr(importlib, "import_module", interrupted)
    assert orthoccp_entry.main(["--version"]) == 130
    assert capsys.readouterr().err == "orthoccp: interrupted\n"


def test_ctrl_c_in_a_running_command_process(tmp_path: Path) -> None:
    """A real SIGINT 0.3 s after start (usually during the imports): exit 130, no traceback."""
    import signal
    import subprocess
    import sys
    import time

    if not hasattr(signal, "SIGINT") or sys.platform == "win32":
        pytest.skip("POSIX signals only")
    argv = ["montecarlo", "ebike", "--reps", "50", "--units", "200", "--out", "mc.json"]
    code = f"import sys, orthoccp_entry; sys.exit(orthoccp_entry.main({argv!r}))"
    proc = subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, cwd=tmp_path)
    time.sleep(0.3)
    proc.send_signal(signal.SIGINT)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 130, err
    assert "Traceback" not in err and err.strip().splitlines()[-1] == "orthoccp: interrupted"


def test_many_indicator_columns_warn_with_the_column_and_count() -> None:
    """Issue 21, item 7: above 50 indicator columns a text state warns (error above 1,000)."""
    frame = base().assign(x0=lambda d: [f"s{i % 60}" for i in range(len(d))])
    with pytest.warns(oc.OrthoCCPWarning, match=r"state column 'x0' becomes 60 indicator columns, one "
                                                 r"per distinct value \(more than 50\)"):
        oc.Panel(frame, unit="bike", period="week", choice="action", states=STATES)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        oc.Panel(base().assign(x0=lambda d: [f"s{i % 50}" for i in range(len(d))]),
                 unit="bike", period="week", choice="action", states=STATES)


def test_montecarlo_reps_ceiling_in_the_api() -> None:
    with pytest.raises(oc.InputError, match=r"reps 10,000,000 exceeds the ceiling of 100,000"):
        oc.run_montecarlo("ebike", reps=10_000_000, units=60, periods=4)


# --------------------------------------------------------------------------- nothing lost silently
def _holes(d: pd.DataFrame) -> pd.DataFrame:
    """NaN in x0 (2 rows), infinity in x1 (1 row), NaN in the utility column (1 row)."""
    d = d.copy()
    d.loc[[2, 20], "x0"] = np.nan
    d.loc[[2, 33], "x1"] = np.inf  # row 2 is counted under x0, the first column it fails
    d.loc[[50], "wear_scaled"] = np.nan
    return d


def test_missing_drop_records_counts_and_warns() -> None:
    frame = _holes(base())
    with pytest.warns(oc.OrthoCCPWarning, match=r"dropped 4 of 360 rows"):
        panel = oc.Panel(frame, unit="bike", period="week", choice="action", states=STATES,
                         missing="drop", extra_columns=["wear_scaled"])
    assert panel.dropped_rows == {
        "missing or infinite value in state column 'x0'": 2,
        "missing or infinite value in state column 'x1'": 1,
        "missing or infinite value in extra column 'wear_scaled'": 1,
    }
    assert (panel.n_input_rows, panel.n_rows, panel.n_dropped) == (360, 356, 4)
    assert panel.describe_dropped().startswith("4 of 360 input rows dropped: 2 missing")
    # The dropped rows leave gaps: rows before them are not linked across, and are counted.
    model = oc.Model(anchor="swap", kind="renewal", discount=0.95, utility=UTILITY)
    res = oc.estimate(panel, model, learner="logit", folds=3)
    acc = res.accounting
    assert acc.n_rows == 356 and acc.n_moment_rows + sum(acc.excluded.values()) == acc.n_rows
    assert acc.excluded["gap before the next observed period"] >= 3
    # The results carry the panel's drops too, so the summary accounts for every input row.
    assert acc.dropped == panel.dropped_rows and acc.n_input_rows == 360
    assert res.summary().count("4 of 360 input rows dropped (2 missing or infinite value in state column 'x0'") == 1
    # missing="error" (the default) refuses the same frame and names the option.
    with pytest.raises(oc.InputError, match=r"x0' has 2 missing or infinite values.*missing='drop'"):
        oc.Panel(frame, unit="bike", period="week", choice="action", states=STATES)
    # Clean data: nothing dropped, no warning.
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        clean = oc.Panel(base(), unit="bike", period="week", choice="action", states=STATES, missing="drop")
    assert clean.dropped_rows == {} and clean.n_dropped == 0 and clean.describe_dropped() == ""


def test_missing_drop_from_the_command_line(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    _holes(base()).to_csv(tmp_path / "panel.csv", index=False)
    doc = base_doc()
    doc["data"]["missing"] = "drop"
    write_spec(tmp_path / "panel.toml", doc)
    out = tmp_path / "res.json"
    assert main(["estimate", str(tmp_path / "panel.csv"), "--spec", str(tmp_path / "panel.toml"), "--json", str(out)]) == 0
    err = capsys.readouterr().err
    assert "orthoccp: warning: dropped 4 of 360 rows" in err and "Traceback" not in err
    res = json.loads(out.read_text())
    assert res["n_rows"] == 356
    assert res["n_moment_rows"] + sum(res["rows_excluded"].values()) == 356
    assert res["n_rows"] + sum(res["rows_dropped"].values()) == 360


def test_gaps_are_counted_not_linked() -> None:
    """Missing unit-period rows (a gap in the periods) are not an error, and not silent."""
    frame = base().drop(index=[2, 14, 15]).reset_index(drop=True)
    panel = oc.Panel(frame, unit="bike", period="week", choice="action", states=STATES)
    assert panel.gap_after.sum() == 2  # bike 0 jumps 1 -> 3, bike 2 jumps 1 -> 4
    assert not np.any((panel.next_row >= 0) & panel.gap_after)
    res = oc.estimate(panel, oc.Model(anchor="swap", kind="renewal", discount=0.95, utility=UTILITY),
                      learner="logit", folds=3)
    assert res.accounting.excluded["gap before the next observed period"] == 2
    assert res.accounting.n_moment_rows + sum(res.accounting.excluded.values()) == len(frame)
    assert "2 gap before the next observed period" in res.summary()


# --------------------------------------------------------------------------- numerical guards
class ExtremeAtZeroWear:
    """Logit CCPs, except at wear 0 where the swap probability is 1e-7 (beyond the clip)."""

    def __init__(self) -> None:
        from sklearn.linear_model import LogisticRegression

        self.inner = LogisticRegression(C=1.0, max_iter=1000)

    def get_params(self, deep: bool = True) -> dict[str, Any]:
        return {}

    def set_params(self, **params: Any) -> ExtremeAtZeroWear:
        return self

    def fit(self, X: np.ndarray, y: np.ndarray) -> ExtremeAtZeroWear:
        self.inner.fit(X, y)
        self.classes_ = self.inner.classes_
        return self

    def predict_proba(self, X: np.ndarray) -> np.ndarray:
        P = self.inner.predict_proba(X)
        P[X[:, 0] == 0] = [1 - 1e-7, 1e-7]
        return P


def test_clipped_probabilities_are_counted_reported_and_warned() -> None:
    panel = oc.Panel(base(), unit="bike", period="week", choice="action", states=STATES)
    model = oc.Model(anchor="swap", kind="renewal", discount=0.95, utility=UTILITY)
    n_zero = int((panel.frame["wear"] == 0).sum())
    assert n_zero > 0.05 * panel.n_rows
    with pytest.warns(oc.OrthoCCPWarning, match=r"moment rows \(more than 1%\) use a probability clipped"):
        res = oc.estimate(panel, model, learner=ExtremeAtZeroWear(), regressor="logit", folds=3, debias=False)
    assert res.clipped == {"keep": n_zero, "swap": n_zero}
    assert f"rows clipped per choice: keep: {n_zero}, swap: {n_zero}" in res.summary()
    assert res.to_dict()["details"]["clipped"] == {"keep": n_zero, "swap": n_zero}


def _result() -> oc.Results:
    panel = oc.Panel(base(), unit="bike", period="week", choice="action", states=STATES)
    model = oc.Model(anchor="swap", kind="renewal", discount=0.95, utility=UTILITY)
    return oc.estimate(panel, model, learner="logit", folds=3)


def test_dominant_units_table_and_warning() -> None:
    res = _result()
    infl = np.ones_like(res.influence)
    infl[7, 1] = 10.0  # one unit carries 100 / (100 + 59) of swap_cost's variance
    rigged = dataclasses.replace(res, influence=infl)
    with pytest.warns(oc.OrthoCCPWarning) as record:
        table = dominant_units(rigged)
    assert list(table.columns) == ["n_units", "n_top", "share", "dominated", "top_units"]
    assert table.loc["swap_cost", "share"] == pytest.approx(100 / 159)
    assert table.loc["wear_cost", "share"] == pytest.approx(1 / 60)
    assert table["dominated"].tolist() == [False, True] and table["n_top"].tolist() == [1, 1]
    label = res.influence_units[7].item()
    assert table.loc["swap_cost", "top_units"] == [label]
    (w,) = record
    assert re.search(rf"parameter 'swap_cost': the top unit of 60 \({label!r}\) carries 63% of its variance", str(w.message))
    assert "error" not in str(w.message)  # the CLI tests reject the word in stderr
    # Balanced influence: no warning; the top 1% of 250 units is 2 units.
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        calm = dominant_units(dataclasses.replace(res, influence=np.ones_like(res.influence)))
    assert not calm["dominated"].any()
    many = dataclasses.replace(res, influence=np.ones((250, 2)), influence_units=np.arange(250))
    assert dominant_units(many, warn=False)["n_top"].tolist() == [2, 2]
    with pytest.raises(oc.InputError, match="threshold must be a share in"):
        dominant_units(res, threshold=1.5)


Z_UTILITY = {"keep": {"wear_cost": "wear_scaled", "z_cost": "z"}, "swap": {"swap_cost": "1"}}


def _unidentified_on_moment_rows(noise: float) -> pd.DataFrame:
    """``z`` equals ``wear_scaled`` plus ``noise`` times N(0, 1) noise, except in the last week,
    whose rows are not moment rows: the design has full rank over all rows."""
    d = base()
    last = d["week"] == d["week"].max()
    rng = np.random.default_rng(0)
    d["z"] = d["wear_scaled"] + np.where(last, rng.normal(size=len(d)), noise * rng.normal(size=len(d)))
    return d


def test_identification_is_checked_on_the_moment_rows() -> None:
    panel = oc.Panel(_unidentified_on_moment_rows(0.0), unit="bike", period="week", choice="action", states=STATES)
    model = oc.Model(anchor="swap", kind="renewal", discount=0.95, utility=Z_UTILITY)
    with pytest.raises(oc.InputError, match=r"not identified: .* collinear .* in the 300 moment rows \(rank 2 of 3\)"):
        oc.estimate(panel, model, learner="logit", folds=3)


def test_newton_failure_is_reported_never_a_silent_nan(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # Nearly collinear on the moment rows (noise 1e-6): rank passes, the Jacobian's condition
    # number (~1e12) exceeds the solver's limit.
    frame = _unidentified_on_moment_rows(1e-6)
    panel = oc.Panel(frame, unit="bike", period="week", choice="action", states=STATES)
    model = oc.Model(anchor="swap", kind="renewal", discount=0.95, utility=Z_UTILITY)
    pattern = r"plug-in solve: the Jacobian is singular or ill-conditioned \(condition number [\d.e+]+, last step \w+\)"
    with pytest.raises(oc.EstimationError, match=pattern):
        oc.estimate(panel, model, learner="logit", folds=3)
    frame.to_csv(tmp_path / "panel.csv", index=False)
    doc = base_doc()
    doc["utility"] = Z_UTILITY
    write_spec(tmp_path / "panel.toml", doc)
    assert main(["estimate", str(tmp_path / "panel.csv"), "--spec", str(tmp_path / "panel.toml")]) == 1
    err = capsys.readouterr().err
    assert re.fullmatch(r"orthoccp: estimation failed: " + pattern + r".*\n", err), err
    # The orthogonal solve's failure names both condition numbers: tests/test_estimate.py.


def test_perfect_separation_is_an_error_not_a_number() -> None:
    """Without the check, Newton 'converges' near theta = -540 with small standard errors."""
    d = base()
    d["action"] = np.where(d["wear_scaled"] > d["wear_scaled"].median(), "swap", "keep")
    panel = oc.Panel(d, unit="bike", period="week", choice="action", states=STATES)
    model = oc.Model(anchor="swap", kind="renewal", discount=0.95, utility=UTILITY)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with pytest.raises(oc.EstimationError, match="separation"):
            oc.estimate(panel, model, learner="logit", folds=3, debias=False)


def test_heteroskedastic_covariance_on_a_panel() -> None:
    panel = oc.Panel(base(), unit="bike", period="week", choice="action", states=STATES)
    model = oc.Model(anchor="swap", kind="renewal", discount=0.95, utility=UTILITY)
    res = oc.estimate(panel, model, learner="logit", folds=3, cov="heteroskedastic")
    assert np.all(np.isfinite(res.std_errors))
    assert res.influence.shape[0] == len(res.influence_units) == res.n_moment_rows


# --------------------------------------------------------------------------- determinism
def test_same_seed_same_json_to_the_last_digit(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    base().to_csv(tmp_path / "panel.csv", index=False)
    write_spec(tmp_path / "panel.toml", base_doc())
    texts = []
    for run in ("a", "b"):
        out = tmp_path / f"{run}.json"
        assert main(["estimate", str(tmp_path / "panel.csv"), "--spec", str(tmp_path / "panel.toml"), "--json", str(out)]) == 0
        doc = json.loads(out.read_text())
        assert set(doc["timings"]) >= {"first_stage_s", "second_stage_s", "total_s"}
        doc["timings"] = None  # wall-clock seconds: the only field that may differ
        texts.append(json.dumps(doc, indent=2))
    capsys.readouterr()
    assert texts[0] == texts[1]


def _tiny_lgbm(n_jobs: int) -> tuple[Any, Any]:
    from lightgbm import LGBMClassifier, LGBMRegressor

    opts = dict(n_estimators=20, num_leaves=7, min_child_samples=5, n_jobs=n_jobs, verbose=-1)
    return LGBMClassifier(**opts), LGBMRegressor(**opts)


def test_lightgbm_threads_do_not_change_the_numbers() -> None:
    panel = oc.Panel(base(), unit="bike", period="week", choice="action", states=STATES)
    model = oc.Model(anchor="swap", kind="renewal", discount=0.95, utility=UTILITY)
    runs = []
    for n_jobs in (1, 2):
        clf, reg = _tiny_lgbm(n_jobs)
        runs.append(oc.estimate(panel, model, learner=clf, regressor=reg, folds=3, scheme="plain", debias=False))
    one, two = runs
    np.testing.assert_array_equal(one.params.to_numpy(), two.params.to_numpy())
    np.testing.assert_array_equal(one.cov.to_numpy(), two.cov.to_numpy())
    np.testing.assert_array_equal(one.influence, two.influence)
