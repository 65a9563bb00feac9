"""Specification of ``orthoccp._options``: one table of the shared options, one message each.

Every entry point that takes a shared option (the Python estimators, :class:`orthoccp.Model`,
the spec reader, the command line, the Monte Carlo harness, the simulators) must reject a bad
value with the same message; only the option's spelling in front differs (``folds``,
``first_stage.folds``, ``--folds``). Data are invented (mechanics only).
"""

from __future__ import annotations

import inspect
import re
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

import orthoccp as oc
from orthoccp._options import OPTIONS, check_option, describe_value
from orthoccp.backends import resolve_backend
from orthoccp.cli import main
from orthoccp.custom import Nuisance, estimate_moments
from orthoccp.discrete import estimate_discrete
from orthoccp.montecarlo import run_montecarlo
from orthoccp.reference import nfxp_estimate
from orthoccp.simulate import simulate
from orthoccp.spec import parse_spec, write_spec

UTILITY = {"keep": {"wear_cost": "wear_scaled"}, "swap": {"swap_cost": "1"}}
MODEL = dict(kind="renewal", anchor="swap", discount=0.95, utility=UTILITY)
SECTION = {"folds": "first_stage", "seed": "first_stage", "splits": "first_stage",
           "scheme": "first_stage", "clip": "first_stage", "learner": "first_stage",
           "regressor": "first_stage", "small_sample": "inference", "debias": "inference",
           "discount": "model"}


@pytest.fixture(scope="module")
def ebike() -> tuple[pd.DataFrame, oc.Panel]:
    frame = simulate("ebike", units=40, periods=4, seed=2).data
    return frame, oc.Panel(frame, unit="bike", period="week", choice="action",
                           states=["wear", "x0", "x1"])


def _doc(name: str | None = None, value: Any = None) -> dict[str, Any]:
    doc: dict[str, Any] = {
        "data": {"unit": "bike", "period": "week", "choice": "action",
                 "states": ["wear", "x0", "x1"]},
        "model": {"kind": "renewal", "anchor": "swap", "discount": 0.95},
        "utility": {c: dict(p) for c, p in UTILITY.items()},
        "first_stage": {"learner": "logit", "folds": 3, "seed": 0},
    }
    if name is not None:
        doc.setdefault(SECTION[name], {})[name] = value
    return doc


def _message(call: Callable[[], Any]) -> str:
    with pytest.raises(oc.InputError) as info:
        call()
    return str(info.value)


def _after(label: str, message: str) -> str:
    """The message from the option's label on (a spec message starts with the file name)."""
    at = message.find(f"{label} must be ")
    assert at >= 0 and (at == 0 or message[at - 1] in " ."), f"{label!r} not named in {message!r}"
    return message[at + len(label):]


# (option, bad value): the bad values each entry point must reject alike.
BAD = [
    ("folds", 1), ("folds", "3"), ("folds", 2.0), ("seed", -1), ("seed", True),
    ("splits", 0), ("scheme", "twice"), ("clip", 0.5), ("clip", "0.01"),
    ("learner", "xgb"), ("regressor", "xgb"), ("small_sample", 1), ("debias", "no"),
    ("discount", 1.0), ("discount", -0.1), ("discount", float("nan")), ("discount", "0.95"),
]

CCP_OPTIONS = {"folds", "seed", "splits", "scheme", "clip", "learner", "regressor",
               "small_sample", "debias"}


def _api_calls(name: str, value: Any, panel: oc.Panel) -> dict[str, Callable[[], Any]]:
    """Every Python entry point that takes the option, called with the bad value."""
    calls: dict[str, Callable[[], Any]] = {}
    ccp = {"learner": "logit", "folds": 3, name: value}
    if name in CCP_OPTIONS:
        calls["estimate"] = lambda: oc.estimate(panel, oc.Model(**MODEL), **ccp)
    if name in {"folds", "seed", "clip"}:
        calls["fold_stability"] = lambda: oc.fold_stability(panel, oc.Model(**MODEL), **ccp)
        nuisance = Nuisance(name="g", target="wear", features=["x0"], by="action",
                            at={"g1": {"action": "swap"}, "g0": {"action": "keep"}})
        calls["estimate_moments"] = lambda: estimate_moments(
            panel, lambda th, r, nu: nu["g1"] - nu["g0"] - th[0], [nuisance],
            parameters=["effect"], **{name: value})
    if name in {"clip", "small_sample", "discount"}:
        options = {"discount": 0.95, name: value}
        calls["estimate_discrete"] = lambda: estimate_discrete(
            panel, utility=UTILITY, **options)  # type: ignore[arg-type]
    if name == "discount":
        calls["Model"] = lambda: oc.Model(**{**MODEL, "discount": value})
        calls["simulate"] = lambda: simulate("ebike", units=2, periods=2, discount=value)
        calls["nfxp_estimate"] = lambda: nfxp_estimate(
            pd.DataFrame({"bus": [0, 0], "month": [0, 1], "mileage": [0, 1], "replace": [0, 1]}),
            unit="bus", period="month", state="mileage", choice="replace",
            choices=(0, 1), anchor=0, utility={1: {"RC": "1"}}, discount=value)
    if name in {"folds", "seed", "learner"}:
        calls["run_montecarlo"] = lambda: run_montecarlo(
            "ebike", units=30, periods=3, reps=1, **{name: value})
    return calls


@pytest.mark.parametrize(("name", "value"), BAD, ids=[f"{n}={v!r}" for n, v in BAD])
def test_one_message_per_bad_value(name: str, value: Any, ebike, tmp_path: Path,
                                   capsys: pytest.CaptureFixture[str]) -> None:
    expected = _after(name, _message(lambda: check_option(name, value)))
    frame, panel = ebike
    seen: dict[str, str] = {}
    for where, call in _api_calls(name, value, panel).items():
        seen[where] = _after(name, _message(call))
    key = f"{SECTION[name]}.{name}"
    seen["parse_spec"] = _after(key, _message(lambda: parse_spec(_doc(name, value))))
    if not (isinstance(value, float) and np.isnan(value)):  # TOML writes no NaN key here
        data, spec = tmp_path / "panel.csv", tmp_path / "panel.toml"
        frame.to_csv(data, index=False)
        write_spec(spec, _doc(name, value))
        assert main(["estimate", str(data), "--spec", str(spec)]) == 2
        seen["cli spec"] = _after(key, capsys.readouterr().err.strip().splitlines()[-1])
    if name in {"folds", "seed"} and not isinstance(value, (str, bool, float)):
        data, spec = tmp_path / "panel.csv", tmp_path / "panel.toml"
        frame.to_csv(data, index=False)
        write_spec(spec, _doc())
        assert main(["estimate", str(data), "--spec", str(spec), f"--{name}", str(value)]) == 2
        seen[f"--{name}"] = _after(f"--{name}", capsys.readouterr().err.strip().splitlines()[-1])
    assert len(seen) >= 2
    want = {where: expected for where in seen}
    if name == "learner":  # the Monte Carlo takes registry names only, and says so
        want["run_montecarlo"] = _after(name, _message(lambda: check_option(
            name, value, note="the Monte Carlo takes registry names only")))
    assert seen == want


@pytest.mark.parametrize(
    ("name", "value", "message"),
    [
        ("folds", 1, "folds must be an integer >= 2, got 1."),
        ("folds", "3", "folds must be an integer >= 2, got '3' (string)."),
        ("clip", 0.7, "clip must be a probability in (0, 0.5), got 0.7."),
        ("discount", 1.0, "discount must be in [0, 1), got 1.0; the infinite-horizon model "
                          "needs a discount below 1 (0 gives a static logit)."),
        ("discount", "x", "discount must be a number in [0, 1), got 'x' (string)."),
        ("jobs", 0, "jobs must be a positive integer or -1 (one worker per core), got 0."),
        ("scheme", "twice", "scheme must be one of 'plain', 'nested', got 'twice'."),
        ("small_sample", np.int64(1), "small_sample must be true or false, got np.int64(1) "
                                      "(integer)."),
    ],
)
def test_messages_name_option_value_and_fix(name: str, value: Any, message: str) -> None:
    with pytest.raises(oc.InputError) as info:
        check_option(name, value)
    assert str(info.value) == message


@pytest.mark.parametrize(
    ("name", "value", "expected"),
    [("folds", np.int64(4), 4), ("jobs", -1, -1), ("clip", 1, None), ("discount", 0, 0.0),
     ("small_sample", np.bool_(True), True), ("learner", "logit", "logit"),
     ("scheme", "plain", "plain")],
)
def test_good_values_come_back_as_plain_python(name: str, value: Any, expected: Any) -> None:
    if expected is None:  # clip=1 is outside (0, 0.5)
        with pytest.raises(oc.InputError, match=r"clip must be a probability in \(0, 0\.5\)"):
            check_option(name, value)
        return
    out = check_option(name, value)
    assert out == expected and type(out) is type(expected)


def test_jobs_message_is_the_same_for_the_backend_and_the_monte_carlo() -> None:
    backend = _message(lambda: resolve_backend(None, 0))
    mc = _message(lambda: run_montecarlo("ebike", units=30, periods=3, reps=1, jobs=0))
    assert _after("n_jobs", backend) == _after("jobs", mc) == _after(
        "jobs", _message(lambda: check_option("jobs", 0)))


def test_defaults_are_estimates_defaults() -> None:
    # The table documents estimate()'s defaults; a changed default must change both.
    signature = inspect.signature(oc.estimate).parameters
    for name, option in OPTIONS.items():
        if name in signature:
            assert signature[name].default == option.default, name
    # The discrete-state estimators share the table's default (issue 23: one vocabulary).
    assert (inspect.signature(estimate_discrete).parameters["small_sample"].default
            is OPTIONS["small_sample"].default is True)


def test_every_option_has_help_and_a_describable_requirement() -> None:
    for name, option in OPTIONS.items():
        assert option.name == name and option.help and not option.help.endswith(".")
        assert option.describe() and "must" not in option.describe()
    assert re.fullmatch(r"one of 'lightgbm', 'logit'(, '\w+')*", OPTIONS["learner"].describe())
    assert OPTIONS["learner"].valid_choices() == oc.learner_names()


def test_describe_value_names_the_type_in_shared_words() -> None:
    assert describe_value("3") == "'3' (string)"
    assert describe_value(True) == "True (boolean)"
    assert describe_value(2.5) == "2.5 (float)"
    assert describe_value([1]) == "[1] (array)"
    assert describe_value("x" * 80).endswith("... (string)")
