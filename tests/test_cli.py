"""Tests of the ``orthoccp`` command line: demo, simulate, estimate, errors and JSON output."""

from __future__ import annotations

import dataclasses
import io
import json
import math
import os
import re
import shlex
import subprocess
import sys
import warnings
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

import orthoccp as oc
from orthoccp.cli import _commands, _plumbing
from orthoccp.cli import main, results_payload
from orthoccp.simulate import simulate
from orthoccp.spec import parse_spec, read_spec, write_spec

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

UNITS, PERIODS, SEED = 300, 8, 0
COVARIATES = 5  # the scenario's relevant covariates only: keeps the learners fast
FAST = ["--learner", "logit", "--folds", "3"]
ENV = {**os.environ, "PYTHONWARNINGS": "ignore"}

NUMBER = (int, float)
SCHEMA: dict[str, Any] = {
    "params": list,
    "debiased": bool,
    "n_units": int,
    "n_rows": int,
    "n_moment_rows": int,
    "seed": int,
    "timings": dict,
    "details": dict,
    "version": str,
    "nulls": dict,
    "inputs": dict,
}
PARAM_SCHEMA: dict[str, Any] = {
    "name": str,
    "estimate": NUMBER,
    "std_error": NUMBER,
    "ci_lower": NUMBER,
    "ci_upper": NUMBER,
}
# the cross-fitted CCP estimator's own record (``details``, kind "cross-fit")
DETAILS_SCHEMA: dict[str, Any] = {
    "kind": str,
    "learner": str,
    "folds": int,
    "n_learner_fits": int,
    "clipped": dict,
    "solution": dict,
}
TIMINGS_SCHEMA: dict[str, Any] = {"first_stage_s": NUMBER, "second_stage_s": NUMBER, "total_s": NUMBER}


def check_types(doc: dict[str, Any], schema: dict[str, Any], where: str) -> None:
    """Required keys present with the right JSON types (booleans are not numbers here)."""
    for key, kind in schema.items():
        assert key in doc, f"{where}: missing key {key!r}"
        value = doc[key]
        if kind is bool:
            assert isinstance(value, bool), f"{where}.{key}: {value!r} is not a boolean"
        else:
            assert not isinstance(value, bool), f"{where}.{key}: unexpected boolean"
            assert isinstance(value, kind), f"{where}.{key}: {value!r} is not {kind}"


def check_results_json(doc: dict[str, Any], *, debiased: bool, n_units: int) -> None:
    """The --json document against the schema of the issue."""
    check_types(doc, SCHEMA, "results")
    assert doc["debiased"] is debiased
    assert doc["n_units"] == n_units
    assert doc["n_rows"] >= doc["n_moment_rows"] > 0
    assert doc["params"], "no parameters"
    for i, p in enumerate(doc["params"]):
        check_types(p, PARAM_SCHEMA, f"params[{i}]")
        assert math.isclose(p["ci_lower"], p["estimate"] - 1.959964 * p["std_error"], rel_tol=1e-5)
        assert math.isclose(p["ci_upper"], p["estimate"] + 1.959964 * p["std_error"], rel_tol=1e-5)
    check_types(doc["timings"], TIMINGS_SCHEMA, "timings")
    check_types(doc["details"], DETAILS_SCHEMA, "details")
    assert doc["details"]["kind"] == "cross-fit"
    for label, count in doc["details"]["clipped"].items():
        assert isinstance(label, str) and isinstance(count, int) and not isinstance(count, bool)
    assert doc["version"] == oc.__version__
    assert doc["nulls"] == {} or all(isinstance(v, str) for v in doc["nulls"].values())


def strict_json(text: str) -> Any:
    """Parse JSON, refusing NaN and infinities."""

    def refuse(name: str) -> None:
        raise AssertionError(f"non-standard JSON constant {name}")

    return json.loads(text, parse_constant=refuse)


def run_cli(args: list[str], *, cwd: Path | None = None, timeout: float = 120) -> subprocess.CompletedProcess[str]:
    """``python -m orthoccp.cli ARGS`` in a subprocess (stderr is a pipe, not a terminal)."""
    return subprocess.run(
        [sys.executable, "-m", "orthoccp.cli", *args],
        capture_output=True,
        text=True,
        cwd=cwd,
        env=ENV,
        timeout=timeout,
    )


def assert_one_line_error(err: str, fragment: str) -> None:
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("orthoccp: error: "), err
    assert re.search(fragment, lines[0]), f"{fragment!r} not in {lines[0]!r}"
    assert "Traceback" not in err


# --------------------------------------------------------------------------- fixtures
@pytest.fixture(scope="module")
def files(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """A simulated panel (CSV) and its spec, written by ``orthoccp simulate`` in-process."""
    folder = tmp_path_factory.mktemp("sim")
    data = folder / "panel.csv"
    rc = main(
        ["simulate", "ebike", "--units", str(UNITS), "--periods", str(PERIODS), "--seed", str(SEED),
         "--covariates", str(COVARIATES), "--out", str(data)]
    )
    assert rc == 0
    return {"data": data, "spec": folder / "panel.toml", "folder": folder}


@pytest.fixture(scope="module")
def fast_spec(files: dict[str, Path]) -> Path:
    """The simulated spec with a fast first stage (logit, 3 folds)."""
    doc = tomllib.loads(files["spec"].read_text())
    doc["first_stage"] = {"learner": "logit", "folds": 3, "seed": SEED}
    path = files["folder"] / "fast.toml"
    write_spec(path, doc)
    return path


# --------------------------------------------------------------------------- basics
def test_version(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["--version"]) == 0
    assert capsys.readouterr().out.strip() == f"orthoccp {oc.__version__}"


@pytest.mark.parametrize("command", [[], ["demo"], ["simulate"], ["estimate"], ["sensitivity"],
                                     ["compare"], ["report"]])
def test_help_has_examples(command: list[str], capsys: pytest.CaptureFixture[str]) -> None:
    assert main([*command, "--help"]) == 0
    out = capsys.readouterr().out
    assert "examples:" in out
    assert "orthoccp " + (command[0] if command else "demo") in out


def test_no_command_and_usage_errors(capsys: pytest.CaptureFixture[str]) -> None:
    assert main([]) == 2
    assert_one_line_error(capsys.readouterr().err, "choose a command")
    assert main(["estimate", "panel.csv"]) == 2
    assert_one_line_error(capsys.readouterr().err, r"required: --spec.*orthoccp estimate --help")
    assert main(["simulate", "cars", "--out", "x.csv"]) == 2
    assert_one_line_error(capsys.readouterr().err, r"invalid choice: 'cars'.*'ebike'")
    assert main(["demo", "--units", "many"]) == 2
    assert_one_line_error(capsys.readouterr().err, r"--units: invalid int value: 'many'")


# --------------------------------------------------------------------------- simulate + estimate
def test_simulate_takes_a_family_design_id(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    from orthoccp.simulate import family_design

    data = tmp_path / "f04.csv"
    assert main(["simulate", "F04", "--units", "60", "--seed", "2", "--out", str(data)]) == 0
    out = capsys.readouterr().out
    design = family_design("F04")
    assert f"design: {design.description}" in out
    doc = tomllib.loads(data.with_suffix(".toml").read_text())
    assert doc["model"]["discount"] == design.discount
    assert doc["model"]["persistent"] == list(design.persistent)
    frame = pd.read_csv(data)
    assert frame[design.unit].nunique() == 60
    assert frame.groupby(design.unit).size().max() == design.periods  # the design's own T
    assert main(["simulate", "G4", "--out", str(data)]) == 2
    assert "or a family design id such as 'F07'" in capsys.readouterr().err


def test_simulate_then_estimate_subprocess(tmp_path: Path) -> None:
    data = tmp_path / "out" / "bikes.csv"
    sim = run_cli(
        ["simulate", "ebike", "--units", str(UNITS), "--periods", str(PERIODS), "--seed", "4",
         "--covariates", str(COVARIATES), "--out", str(data)]
    )
    assert sim.returncode == 0, sim.stderr
    spec_path = tmp_path / "out" / "bikes.toml"
    assert data.is_file() and spec_path.is_file()
    doc = tomllib.loads(spec_path.read_text())
    assert doc["data"]["path"] == "bikes.csv"  # relative to the spec
    assert doc["model"] == {
        "kind": "renewal",
        "anchor": "swap",
        "discount": 0.95,
        "persistent": doc["model"]["persistent"],
    }
    assert doc["first_stage"]["seed"] == 4
    assert "True parameters: wear_cost = -1.0, swap_cost = -5.0" in spec_path.read_text()
    frame = pd.read_csv(data)
    assert len(frame) == UNITS * PERIODS and frame["bike"].nunique() == UNITS
    assert "estimate with: orthoccp estimate" in sim.stdout

    out_json, out_tex = tmp_path / "res" / "r.json", tmp_path / "r.tex"
    est = run_cli(["estimate", str(data), "--spec", str(spec_path), *FAST, "--json", str(out_json), "--latex", str(out_tex)])
    assert est.returncode == 0, est.stderr
    assert "orthoccp: [" not in est.stderr  # no progress when stderr is not a terminal
    assert "error" not in est.stderr
    assert "orthogonal (debiased) CCP estimator" in est.stdout
    assert "wear_cost" in est.stdout and "swap_cost" in est.stdout
    doc = strict_json(out_json.read_text())
    check_results_json(doc, debiased=True, n_units=UNITS)
    assert (doc["details"]["learner"], doc["details"]["folds"], doc["seed"]) == ("logit", 3, 4)
    assert [p["name"] for p in doc["params"]] == ["wear_cost", "swap_cost"]
    assert out_tex.read_text().startswith("\\begin{tabular}")
    # docs/cli.md's layout table names every top-level key (functions: only with --function)
    assert set(doc) == documented_json_keys() - {"functions"}


def documented_json_keys() -> set[str]:
    """The top-level keys that docs/cli.md's "The results JSON" table documents."""
    text = (Path(__file__).resolve().parent.parent / "docs" / "cli.md").read_text(encoding="utf-8")
    section = text[text.index("### The results JSON"):]
    section = section[:section.index("\n#", 1)]  # up to the next heading
    rows = [line for line in section.splitlines() if line.startswith("| `")]
    return {key for row in rows for key in re.findall(r"`([a-z_]+)`", row.split("|")[1])}


def _estimates(argv: list[str], tmp_path: Path, name: str) -> dict[str, Any]:
    out = tmp_path / f"{name}.json"
    assert main([*argv, "--json", str(out)]) == 0
    return strict_json(out.read_text())


def test_estimate_reproduces_and_matches_the_api(
    files: dict[str, Path], fast_spec: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    argv = ["estimate", str(files["data"]), "--spec", str(fast_spec)]
    first = _estimates(argv, tmp_path, "a")
    second = _estimates(argv, tmp_path, "b")
    assert first["params"] == second["params"]
    check_results_json(first, debiased=True, n_units=UNITS)
    # The same estimate straight from the Python API on the simulated frame.
    sim = simulate("ebike", units=UNITS, periods=PERIODS, seed=SEED, n_covariates=COVARIATES)
    panel = oc.Panel(sim.data, unit=sim.unit, period=sim.period, choice=sim.choice, states=list(sim.states))
    model = oc.Model(anchor=sim.anchor, kind=sim.kind, discount=sim.discount, utility=sim.utility, persistent=sim.persistent)  # type: ignore[arg-type]
    res = oc.estimate(panel, model, learner="logit", folds=3, seed=SEED)
    got = np.array([p["estimate"] for p in first["params"]])
    np.testing.assert_allclose(got, res.params.to_numpy(), rtol=1e-10, atol=0)
    np.testing.assert_allclose([p["std_error"] for p in first["params"]], res.std_errors.to_numpy(), rtol=1e-10)
    # Another seed gives other folds, hence (slightly) other estimates.
    other = _estimates([*argv, "--seed", "1"], tmp_path, "c")
    assert other["seed"] == 1 and other["params"] != first["params"]
    capsys.readouterr()


def test_functions_of_the_parameters_in_summary_and_json(
    files: dict[str, Path], fast_spec: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """``--function``: the delta-method row equals Results.derive on the same estimate, and a
    bad expression or name fails before any estimation with exit code 2."""
    argv = ["estimate", str(files["data"]), "--spec", str(fast_spec),
            "--function", "gap=wear_cost - swap_cost"]
    doc = _estimates(argv, tmp_path, "fn")
    row = doc["functions"][0]
    est = {p["name"]: p["estimate"] for p in doc["params"]}
    assert row["name"] == "gap" and row["expression"] == "wear_cost - swap_cost"
    assert row["estimate"] == pytest.approx(est["wear_cost"] - est["swap_cost"], rel=1e-12)
    sim = simulate("ebike", units=UNITS, periods=PERIODS, seed=SEED, n_covariates=COVARIATES)
    panel = oc.Panel(sim.data, unit=sim.unit, period=sim.period, choice=sim.choice, states=list(sim.states))
    model = oc.Model(anchor=sim.anchor, kind=sim.kind, discount=sim.discount, utility=sim.utility, persistent=sim.persistent)  # type: ignore[arg-type]
    ref = oc.estimate(panel, model, learner="logit", folds=3, seed=SEED).derive({"gap": "wear_cost - swap_cost"})
    assert row["std_error"] == pytest.approx(ref.loc["gap", "std_error"], rel=1e-10)
    assert "functions of the parameters (delta method" in capsys.readouterr().out
    for bad, message in (("gap=price / 2", "'price' is not a parameter"), ("gap", "NAME=VALUE")):
        assert main(["estimate", str(files["data"]), "--spec", str(fast_spec), "--function", bad]) == 2
        assert message in capsys.readouterr().err


def test_counterfactual_command_from_a_saved_estimate(
    files: dict[str, Path], fast_spec: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """``orthoccp counterfactual --results r.json`` equals the API on the same estimate, and
    without --results it estimates first (same options, same numbers)."""
    saved = tmp_path / "r.json"
    assert main(["estimate", str(files["data"]), "--spec", str(fast_spec), "--json", str(saved)]) == 0
    argv = ["counterfactual", str(files["data"]), "--spec", str(fast_spec), "--shift", "swap=1",
            "--money=-swap_cost"]
    assert main([*argv, "--results", str(saved), "--csv", str(tmp_path / "a.csv")]) == 0
    assert main([*argv, "--json", str(tmp_path / "b.json")]) == 0
    a = pd.read_csv(tmp_path / "a.csv")
    b = pd.DataFrame(strict_json((tmp_path / "b.json").read_text())["rows"])
    np.testing.assert_allclose(a["estimate"], b["estimate"], rtol=1e-10)
    np.testing.assert_allclose(a["std_error"], b["std_error"], rtol=1e-8)
    sim = simulate("ebike", units=UNITS, periods=PERIODS, seed=SEED, n_covariates=COVARIATES)
    panel = oc.Panel(sim.data, unit=sim.unit, period=sim.period, choice=sim.choice, states=list(sim.states))
    model = oc.Model(anchor=sim.anchor, kind=sim.kind, discount=sim.discount, utility=sim.utility, persistent=sim.persistent)  # type: ignore[arg-type]
    res = oc.estimate(panel, model, learner="logit", folds=3, seed=SEED)
    ref = oc.counterfactual(res, panel, model, shift={"swap": 1.0}, money="-swap_cost", seed=SEED)
    np.testing.assert_allclose(a["estimate"], ref.table["estimate"].to_numpy(), rtol=1e-10)
    assert "value per unit (money)" in capsys.readouterr().out
    for bad, message in ((["--shift", "swap"], "write NAME=VALUE"), (["--shift", "swap=x"], "finite number"),
                         ([], "give at least one change")):
        assert main(["counterfactual", str(files["data"]), "--spec", str(fast_spec), *bad]) == 2
        assert message in capsys.readouterr().err


def test_naive_and_overrides(files: dict[str, Path], fast_spec: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    doc = _estimates(["estimate", str(files["data"]), "--spec", str(fast_spec), "--naive", "--folds", "4"], tmp_path, "naive")
    check_results_json(doc, debiased=False, n_units=UNITS)
    assert doc["details"]["folds"] == 4
    assert "plug-in CCP estimator" in capsys.readouterr().out


def test_data_path_from_spec_and_json_to_stdout(fast_spec: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["estimate", "--spec", str(fast_spec), "--json", "-"]) == 0
    out = capsys.readouterr().out
    doc = strict_json(out)  # stdout is exactly the JSON document
    check_results_json(doc, debiased=True, n_units=UNITS)
    assert doc["inputs"]["spec"] == str(fast_spec)


def test_integer_choice_labels(files: dict[str, Path], fast_spec: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    frame = pd.read_csv(files["data"])
    frame["action"] = (frame["action"] == "swap").astype(int)
    frame.to_csv(tmp_path / "int.csv", index=False)
    doc = tomllib.loads(fast_spec.read_text())
    doc["utility"] = {"0": doc["utility"]["keep"], "1": doc["utility"]["swap"]}
    doc["data"]["path"] = "int.csv"
    for anchor in (1, "1"):
        doc["model"]["anchor"] = anchor
        write_spec(tmp_path / "int.toml", doc)
        assert main(["estimate", "--spec", str(tmp_path / "int.toml")]) == 0
    assert "anchor 1," in capsys.readouterr().out
    doc["model"]["anchor"] = "swap"
    write_spec(tmp_path / "int.toml", doc)
    assert main(["estimate", "--spec", str(tmp_path / "int.toml")]) == 2
    assert_one_line_error(capsys.readouterr().err, r"model\.anchor: choice 'swap' is not among the choices observed")


def test_empty_utility_table_matches_the_api(files: dict[str, Path], fast_spec: Path, tmp_path: Path) -> None:
    """A choice without parameters written as an empty [utility.keep] table: the CLI gives
    the API's estimates with utility={"keep": {}, ...}."""
    doc = tomllib.loads(fast_spec.read_text())
    utility = {"keep": {}, "swap": {"swap_cost": "1", "wear_cost": "wear_scaled"}}
    doc["utility"] = utility
    doc["data"]["path"] = str(files["data"])
    write_spec(tmp_path / "empty.toml", doc)
    assert "[utility.keep]\n\n" in (tmp_path / "empty.toml").read_text()
    out = tmp_path / "empty.json"
    assert main(["estimate", "--spec", str(tmp_path / "empty.toml"), "--json", str(out)]) == 0
    got = {p["name"]: p["estimate"] for p in strict_json(out.read_text())["params"]}
    spec = read_spec(tmp_path / "empty.toml")
    panel = spec.build_panel(spec.load_data())
    model = oc.Model(anchor="swap", kind="renewal", discount=doc["model"]["discount"], utility=utility,
                     persistent=doc["model"].get("persistent", ()))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        api = oc.estimate(panel, model, **spec.estimate_options())
    assert got == pytest.approx(api.params.to_dict(), rel=1e-12)


# --------------------------------------------------------------------------- bad input
Case = Callable[[dict[str, Path], Path, Path], list[str]]


def _spec_text(fast_spec: Path, tmp_path: Path, old: str, new: str) -> str:
    text = fast_spec.read_text()
    assert old in text, old
    path = tmp_path / "edited.toml"
    path.write_text(text.replace(old, new, 1))
    return str(path)


def _data_frame(files: dict[str, Path], tmp_path: Path, edit: Callable[[pd.DataFrame], pd.DataFrame]) -> str:
    path = tmp_path / "edited.csv"
    edit(pd.read_csv(files["data"])).to_csv(path, index=False)
    return str(path)


def _with_text_state(frame: pd.DataFrame) -> pd.DataFrame:
    frame["x0"] = frame["x0"].astype(object)
    frame.loc[5, "x0"] = "high"
    return frame


def _spec_case(old: str, new: str) -> Case:
    return lambda f, s, t: ["estimate", str(f["data"]), "--spec", _spec_text(s, t, old, new)]


def _data_case(edit: Callable[[pd.DataFrame], pd.DataFrame]) -> Case:
    return lambda f, s, t: ["estimate", _data_frame(f, t, edit), "--spec", str(s)]


BAD_INPUTS: list[tuple[str, Case, str]] = [
    ("missing data file", lambda f, s, t: ["estimate", str(t / "nope.csv"), "--spec", str(s)], r"data file not found: '.*nope\.csv'"),
    ("missing spec file", lambda f, s, t: ["estimate", str(f["data"]), "--spec", str(t / "nope.toml")], r"spec file not found: '.*nope\.toml'"),
    ("unknown column", _spec_case('"wear", "x0"', '"wear", "mileage", "x0"'), r"data\.states: column 'mileage' is not in the data"),
    ("unknown utility column", _spec_case('"wear_scaled"', '"wear_level"'), r"utility\.keep\.wear_cost: column 'wear_level'"),
    ("anchor not in data", _spec_case('anchor = "swap"', 'anchor = "replace"'), r"model\.anchor: choice 'replace' is not among the choices.*'keep', 'swap'"),
    ("discount 1.0", _spec_case("discount = 0.95", "discount = 1.0"), r"model\.discount must be in \[0, 1\).*got 1\.0"),
    ("duplicate unit-period rows", _data_case(lambda d: pd.concat([d, d.iloc[[7]]])), r"edited\.csv: 2 rows share a unit and period.*bike=.*week="),
    ("state column with text", _data_case(_with_text_state), r"state column 'x0' .*text such as 'high'"),
    ("unknown spec key", _spec_case("folds = 3", "foldz = 3"), r"unknown key 'foldz' in \[first_stage\]; valid keys: learner, regressor, folds"),
    ("unknown spec table", _spec_case("[first_stage]", "[first_stages]"), r"unknown table or key 'first_stages'"),
    ("wrong type in spec", _spec_case("folds = 3", 'folds = "3"'), r"first_stage\.folds must be an integer >= 2, got '3' \(string\)"),
    ("wrong type: discount", _spec_case("discount = 0.95", 'discount = "high"'), r"model\.discount must be a number in \[0, 1\), got 'high' \(string\)"),
    ("invalid TOML", _spec_case("folds = 3", "folds = = 3"), r"edited\.toml: not valid TOML"),
    ("unknown learner in spec", _spec_case('learner = "logit"', 'learner = "boosting"'), r"first_stage\.learner must be one of"),
    ("bad --folds", lambda f, s, t: ["estimate", str(f["data"]), "--spec", str(s), "--folds", "1"], r"--folds must be an integer >= 2, got 1"),
    ("unsupported extension", lambda f, s, t: ["estimate", str(t / "panel.xlsx"), "--spec", str(s)], r"unsupported extension '\.xlsx'; use \.csv or \.parquet"),
    ("empty data file", lambda f, s, t: ["estimate", str(_touch(t / "empty.csv")), "--spec", str(s)], r"empty\.csv' is empty"),
    ("simulate: bad units", lambda f, s, t: ["simulate", "ebike", "--units", "0", "--out", str(t / "x.csv")], r"units must be an integer >= 1; got 0"),
    ("demo: out not empty", lambda f, s, t: ["demo", "--out", str(f["folder"])], r"exists and is not an empty folder"),
    ("demo: bad folds", lambda f, s, t: ["demo", "--folds", "1", "--out", str(t / "d")], r"--folds must be an integer >= 3 \(the demo's nested"),
    ("compare: unknown learner", lambda f, s, t: ["compare", str(f["data"]), "--spec", str(s), "--with", "xgb"], r"--with: invalid choice: 'xgb'"),
    ("compare: repeated learner", lambda f, s, t: ["compare", str(f["data"]), "--spec", str(s), "--with", "logit", "--with", "logit"], r"--with 'logit' is given twice"),
    ("compare: baseline not compared", lambda f, s, t: ["compare", str(f["data"]), "--spec", str(s), "--with", "logit", "--baseline", "lasso_logit"], r"--baseline 'lasso_logit' is not among the first stages \(logit\); add --with lasso_logit"),
    ("report: not html", lambda f, s, t: ["report", str(f["data"]), "--spec", str(s), "--out", str(t / "r.txt")], r"--out '.*r\.txt' must be an \.html file name"),
    ("report: needs --out", lambda f, s, t: ["report", str(f["data"]), "--spec", str(s)], r"required: --out"),
]


def _touch(path: Path) -> Path:
    path.write_text("")
    return path


@pytest.mark.parametrize(("case", "fragment"), [c[1:] for c in BAD_INPUTS], ids=[c[0] for c in BAD_INPUTS])
def test_bad_input(
    case: Case, fragment: str, files: dict[str, Path], fast_spec: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    argv = case(files, fast_spec, tmp_path)
    assert main(argv) == 2
    captured = capsys.readouterr()
    assert_one_line_error(captured.err, fragment)
    assert captured.out == ""


def test_parquet_needs_pyarrow(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    import importlib.util

    if importlib.util.find_spec("pyarrow") is not None:
        pytest.skip("pyarrow is installed")
    assert main(["simulate", "ebike", "--units", "20", "--out", str(tmp_path / "p.parquet")]) == 2
    assert_one_line_error(capsys.readouterr().err, r"needs pyarrow, which is not installed; install it with 'pip install pyarrow'")
    assert not (tmp_path / "p.toml").exists()


def test_bad_input_subprocess(
    files: dict[str, Path], fast_spec: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    spec = _spec_text(fast_spec, tmp_path, "discount = 0.95", "discount = 1.0")
    proc = run_cli(["estimate", str(files["data"]), "--spec", spec])
    assert proc.returncode == 2 and proc.stdout == ""
    assert_one_line_error(proc.stderr, r"model\.discount must be in \[0, 1\)")
    assert main(["estimate", str(files["data"]), "--spec", spec, "--debug"]) == 2
    err = capsys.readouterr().err
    assert "Traceback" in err and err.strip().splitlines()[-1].startswith("orthoccp: error:")
    assert main(["--debug", "estimate", str(files["data"]), "--spec", spec]) == 2
    assert "Traceback" in capsys.readouterr().err


def test_estimation_error_exit_1(
    files: dict[str, Path], fast_spec: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    def fail(*args: Any, **kwargs: Any) -> None:
        raise oc.EstimationError("Newton iterations did not converge\n(condition number 1e12)")

    monkeypatch.setattr(oc, "estimate", fail)
    assert main(["estimate", str(files["data"]), "--spec", str(fast_spec)]) == 1
    err = capsys.readouterr().err
    assert err.strip() == "orthoccp: estimation failed: Newton iterations did not converge (condition number 1e12)"
    assert main(["estimate", str(files["data"]), "--spec", str(fast_spec), "--debug"]) == 1
    assert "Traceback" in capsys.readouterr().err


# --------------------------------------------------------------------------- JSON and progress
def test_json_never_writes_nan(files: dict[str, Path], fast_spec: Path) -> None:
    spec = read_spec(fast_spec)
    frame = spec.load_data(files["data"])
    panel = spec.build_panel(frame)
    res = oc.estimate(panel, spec.build_model(panel), **spec.estimate_options())
    shares = res.decomposition.copy()
    shares.iloc[0, 0] = np.nan
    broken = dataclasses.replace(res, decomposition=shares, timings={**res.timings, "total_s": math.inf})
    doc = results_payload(broken, inputs={"data": "d.csv"})
    text = json.dumps(doc, allow_nan=False)
    back = strict_json(text)
    name, column = shares.index[0], shares.columns[0]
    assert back["variance_shares"][name][column] is None
    assert back["timings"]["total_s"] is None
    assert f"variance_shares.{name}.{column}" in back["nulls"]
    assert "timings.total_s" in back["nulls"]
    assert back["inputs"] == {"data": "d.csv"}


def test_progress_only_on_a_terminal() -> None:
    class Terminal(io.StringIO):
        def isatty(self) -> bool:
            return True

    tty, pipe = Terminal(), io.StringIO()
    _plumbing._Progress(stream=tty).stage("first stage")
    _plumbing._Progress(stream=pipe).stage("first stage")
    assert re.fullmatch(r"orthoccp: \[\s*\d+\.\ds\] first stage\n", tty.getvalue())
    assert pipe.getvalue() == ""


# --------------------------------------------------------------------------- demo
def test_demo_folder_numbering(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(tmp_path)
    made = [_commands._demo_folder(None) for _ in range(3)]
    assert [p.name for p in made] == ["orthoccp-demo", "orthoccp-demo-2", "orthoccp-demo-3"]
    assert _commands._demo_folder(str(tmp_path / "mine" / "deep")).is_dir()


def test_demo_runs_and_its_rerun_command_works(tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    (tmp_path / "orthoccp-demo").mkdir()  # taken: the demo must pick the next name
    proc = run_cli(["demo", "--units", str(UNITS), "--periods", str(PERIODS), "--folds", "3"], cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    assert "orthoccp: [" not in proc.stderr and "error" not in proc.stderr
    folder = tmp_path / "orthoccp-demo-2"
    assert (folder / "ebike.csv").is_file() and (folder / "ebike.toml").is_file()
    out = proc.stdout
    assert "orthogonal (debiased) CCP estimator" in out
    header = next(line for line in out.splitlines() if line.startswith("parameter") and "truth" in line)
    for column in ("truth", "plug-in", "s.e.", "debiased", "plug-in covers", "debiased covers"):
        assert column in header
    rows = [line.split() for line in out.splitlines() if line.startswith(("wear_cost ", "swap_cost "))]
    table = {r[0]: r for r in rows if len(r) == 8}
    assert set(table) == {"wear_cost", "swap_cost"}
    assert float(table["wear_cost"][1]) == -1.0 and float(table["swap_cost"][1]) == -5.0
    assert all(r[6] in ("yes", "no") and r[7] in ("yes", "no") for r in table.values())
    report = (folder / "report.html").read_text()
    assert "<th>truth</th>" in report and "<h3 id='fs-logit'>logit</h3>" in report
    assert f"Wrote orthoccp-demo-2/report.html: lightgbm against the parametric logit" in out
    rerun = next(line.strip() for line in out.splitlines() if line.strip().startswith("orthoccp estimate"))
    assert rerun == "orthoccp estimate orthoccp-demo-2/ebike.csv --spec orthoccp-demo-2/ebike.toml"
    # Run the printed command (from the same folder) and get the demo's debiased estimates.
    monkeypatch.chdir(tmp_path)
    argv = shlex.split(rerun)[1:]
    assert main([*argv, "--json", "rerun.json"]) == 0
    doc = strict_json((tmp_path / "rerun.json").read_text())
    check_results_json(doc, debiased=True, n_units=UNITS)
    assert doc["details"]["learner"] == "lightgbm"
    for p in doc["params"]:
        assert float(table[p["name"]][4]) == pytest.approx(p["estimate"], abs=5e-5)
    capsys.readouterr()


def test_demo_output_reads_cleanly(tmp_path: Path) -> None:
    """What a first-time reader sees, stdout and stderr interleaved as on a terminal.

    A small panel whose debiased solve falls back to the one-step estimator, so that the
    run has warnings to place.
    """
    proc = subprocess.run(
        [sys.executable, "-m", "orthoccp.cli", "demo", "--units", "400", "--periods", "6",
         "--folds", "3", "--out", str(tmp_path / "d")],
        stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True, cwd=tmp_path,
        env={**os.environ, "PYTHONUNBUFFERED": "1", "OMP_NUM_THREADS": "1"}, timeout=120,
    )
    assert proc.returncode == 0, proc.stdout
    lines = proc.stdout.splitlines()
    first_header = next(i for i, line in enumerate(lines) if "orthogonal (debiased) CCP estimator" in line)
    assert not [line for line in lines[:first_header] if "warning" in line.lower()]
    # The run's warnings (this run warns that its intervals come from the one-step estimator;
    # the comparison run may add its own interval checks) are printed under it, once per
    # parameter and run, and not as bare lines on stderr.
    caution = [i for i, line in enumerate(lines) if "treat its interval with caution" in line]
    assert len(caution) in (2, 4) and min(caution) > first_header
    assert len(caution) == len(set(lines[i] for i in caution))
    warned = [i for i, line in enumerate(lines) if line.startswith("Warnings from ")]
    assert all(i > first_header for i in warned)
    assert not [line for line in lines if line.startswith("orthoccp: warning")]
    # One plug-in value per parameter: the table's plug-in column, not a second line.
    assert not [line for line in lines if "plug-in estimates" in line]
    header = next(line for line in lines if line.startswith("parameter") and "truth" in line)
    assert header.split()[2] == "plug-in"
    for name in ("wear_cost", "swap_cost"):
        rows = [line.split() for line in lines if line.startswith(name + " ")]
        assert len([r for r in rows if len(r) == 8]) == 1  # the truth-vs-estimates row
        assert len(rows) == 2  # and the summary's row, which has no plug-in value
    assert re.search(r"\bnan\b", proc.stdout, flags=re.IGNORECASE) is None
    assert "persistent states x0, x1, x2, ..., x29 (30 states);" in proc.stdout  # not all 30
    # Variance shares Cov(part, psi)/Var(psi) add up to 100 % with no cross term.
    start = next(i for i, line in enumerate(lines) if line.startswith("variance shares"))
    for line in lines[start + 1:start + 3]:
        name, *pairs = line.split()
        parts = dict(zip(pairs[::2], pairs[1::2]))
        assert set(parts) == {"m", "phi_mu", "phi_P"}, line
        assert sum(float(v.rstrip("%")) for v in parts.values()) == pytest.approx(100.0, abs=0.1)


# --------------------------------------------------------------------------- sensitivity
def test_sensitivity_rows_equal_fresh_estimates(
    files: dict[str, Path], fast_spec: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    pytest.importorskip("matplotlib")
    csv, plot = tmp_path / "beta.csv", tmp_path / "beta.png"
    argv = ["sensitivity", str(files["data"]), "--spec", str(fast_spec), "--discounts",
            "0.99,0.9", "--csv", str(csv), "--plot", str(plot), "--json", str(tmp_path / "b.json")]
    assert main(argv) == 0
    text = capsys.readouterr().out
    assert "orthoccp sensitivity to the discount factor (assumed: 0.95)" in text
    table = pd.read_csv(csv)
    assert sorted(set(table["discount"])) == [0.9, 0.99] and plot.stat().st_size > 1000
    spec = read_spec(fast_spec)
    panel = spec.build_panel(spec.load_data(files["data"]))
    model = spec.build_model(panel)
    for beta in (0.9, 0.99):
        fresh = oc.estimate(panel, dataclasses.replace(model, discount=beta),
                            **spec.estimate_options())
        rows = table[table["discount"] == beta].set_index("parameter")
        for name, value in fresh.params.items():
            assert rows.loc[name, "estimate"] == pytest.approx(float(value), rel=0, abs=1e-8)
    assert strict_json((tmp_path / "b.json").read_text())["assumed_discount"] == 0.95


@pytest.mark.parametrize("discounts, fragment", [("0.9,x", "separated by commas"),
                                                 ("0.9", "at least two")])
def test_sensitivity_bad_grid(files: dict[str, Path], fast_spec: Path, discounts: str,
                              fragment: str, capsys: pytest.CaptureFixture[str]) -> None:
    code = main(["sensitivity", str(files["data"]), "--spec", str(fast_spec), "--discounts",
                 discounts])
    assert code == 2
    assert fragment in capsys.readouterr().err


# --------------------------------------------------------------------------- compare, report
def test_compare_matches_the_api_and_writes_tables(
    files: dict[str, Path], fast_spec: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "cmp.json"
    argv = ["compare", str(files["data"]), "--spec", str(fast_spec), "--with", "logit", "--with", "lasso_logit",
            "--json", str(out), "--latex", str(tmp_path / "cmp.tex"), "--html", str(tmp_path / "cmp.html")]
    assert main(argv) == 0
    text = capsys.readouterr().out
    assert "orthoccp comparison of first stages (baseline: logit); all debiased" in text
    assert "joint test lasso_logit = logit: Wald" in text
    doc = strict_json(out.read_text())
    assert doc["baseline"] == "logit" and list(doc["first_stages"]) == ["logit", "lasso_logit"]
    spec = read_spec(fast_spec)
    panel = spec.build_panel(spec.load_data(files["data"]))
    model = spec.build_model(panel)
    options = {k: v for k, v in spec.estimate_options().items() if k != "learner"}
    api = oc.compare(panel, model, first_stages={"logit": "logit", "lasso_logit": "lasso_logit"}, **options)
    for label, res in api.results.items():
        got = {p["name"]: p["estimate"] for p in doc["first_stages"][label]["params"]}
        for name, value in res.params.items():
            assert got[name] == pytest.approx(float(value), rel=1e-12)
    test = {r["parameter"]: r for r in doc["tests"]["lasso_logit"]["parameters"]}
    for name, row in api.tests["lasso_logit"].iterrows():
        assert test[name]["p_value"] == pytest.approx(float(row["p_value"]), rel=1e-9)
    assert (tmp_path / "cmp.tex").read_text().startswith("\\begin{tabular}")
    assert "<table" in (tmp_path / "cmp.html").read_text()


def test_report_command(files: dict[str, Path], fast_spec: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "report.html"
    argv = ["report", str(files["data"]), "--spec", str(fast_spec), "--with", "logit", "--with", "lasso_logit",
            "--out", str(out)]
    assert main(argv) == 0
    text = capsys.readouterr().out
    assert f"wrote {out}" in text and "lasso_logit: fold stability:" in text
    html_text = out.read_text()
    assert "Fold stability (each fold" in html_text and html_text.count("data:image/png;base64,") >= 8
    assert "id='data'" in html_text and "id='discount'" not in html_text
    assert f"orthoccp report {files['data']} --spec {fast_spec}" in html_text  # provenance
    quick = tmp_path / "quick.html"
    assert main([*argv[:-2], "--out", str(quick), "--no-stability", "--discounts", "0.9,0.95"]) == 0
    quick_text = quick.read_text()
    assert "Fold stability" not in quick_text and "id='discount'" in quick_text
    from orthoccp.report import favoured_first_stage

    spec = read_spec(fast_spec)
    panel = spec.build_panel(spec.load_data(files["data"]))
    options = {k: v for k, v in spec.estimate_options().items() if k != "learner"}
    api = oc.compare(panel, spec.build_model(panel),
                     first_stages={"logit": "logit", "lasso_logit": "lasso_logit"}, **options)
    favoured = favoured_first_stage(api)[0]
    assert f"with the {favoured} first stage (fitted once" in quick_text


# --------------------------------------------------------------------------- discrete estimator
BUS_SPEC = """\
[data]
unit = "bus"
period = "month"
choice = "action"
states = ["mileage"]
path = "bus.csv"

[model]
discount = 0.975

[utility.keep]
theta11 = "neg_mileage_k"

[utility.replace]
replace_cost = "1"

[estimator]
method = "npl"
n_states = 175
transitions = "increments"
reset_choices = ["replace"]
"""


@pytest.fixture(scope="module")
def bus_files(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Su & Judd (2012) bus design (simulated by orthoccp.reference), 50 buses x 120 months."""
    from orthoccp.reference import simulate_bus

    folder = tmp_path_factory.mktemp("bus")
    simulate_bus(buses=50, periods=120, seed=1).to_csv(folder / "bus.csv", index=False)
    (folder / "bus.toml").write_text(BUS_SPEC)
    return folder


def test_spec_selects_the_npl_estimator(bus_files: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = bus_files / "npl.json"
    assert main(["estimate", "--spec", str(bus_files / "bus.toml"), "--json", str(out)]) == 0
    text = capsys.readouterr().out
    assert "nested pseudo-likelihood (NPL) estimator" in text and "NPL iterations" in text
    doc = strict_json(out.read_text())
    spec = read_spec(bus_files / "bus.toml")
    assert spec.model.anchor is None and spec.estimator.method == "npl"
    panel = spec.build_panel(spec.load_data())
    api = oc.estimate_discrete(panel, utility={"keep": {"theta11": "neg_mileage_k"}, "replace": {"replace_cost": "1"}},
                               discount=0.975, n_states=175, transitions="increments", reset_choices=["replace"])
    got = {p["name"]: (p["estimate"], p["std_error"]) for p in doc["params"]}
    for name in api.params.index:
        assert got[name] == pytest.approx((float(api.params[name]), float(api.std_errors[name])), rel=1e-12)
    # The spec round-trips, [estimator] included.
    again = parse_spec(spec.to_dict(relative_to=bus_files), base_dir=bus_files)
    assert again.estimator == spec.estimator and again.model == spec.model


@pytest.mark.parametrize(
    ("edit", "argv_extra", "fragment"),
    [
        (("[estimator]\nmethod = \"npl\"", "[estimator]\nmethod = \"npl\"\nsteps = 0"), [], r"estimator\.steps must be an integer >= 1, got 0"),
        (("method = \"npl\"", "method = \"newton\""), [], r"estimator\.method must be one of 'orthogonal', 'npl', 'pml', got 'newton'"),
        (("method = \"npl\"", "method = \"orthogonal\""), [], r"estimator\.n_states applies to the discrete-state estimators only"),
        (("[estimator]", "[first_stage]\nlearner = \"logit\"\n\n[estimator]"), [], r"first_stage\.learner does not apply with estimator\.method = 'npl'"),
        (("n_states = 175", "n_states = 175\nspeed = 2"), [], r"unknown key 'speed' in \[estimator\]"),
        (None, ["--learner", "logit"], r"--learner does not apply: the spec selects estimator\.method = 'npl'"),
        (None, ["--naive"], r"--naive does not apply"),
    ],
)
def test_discrete_spec_errors(bus_files: Path, edit: Any, argv_extra: list[str], fragment: str, tmp_path: Path,
                              capsys: pytest.CaptureFixture[str]) -> None:
    text = BUS_SPEC if edit is None else BUS_SPEC.replace(*edit)
    spec = tmp_path / "bus.toml"
    spec.write_text(text.replace('path = "bus.csv"', f'path = {json.dumps(str(bus_files / "bus.csv"))}'))
    assert main(["estimate", "--spec", str(spec), *argv_extra]) == 2
    assert_one_line_error(capsys.readouterr().err, fragment)


def test_compare_refuses_a_discrete_spec(bus_files: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["compare", "--spec", str(bus_files / "bus.toml")]) == 2
    assert_one_line_error(capsys.readouterr().err, r"runs the orthogonal estimator; the spec selects estimator\.method = 'npl'")
