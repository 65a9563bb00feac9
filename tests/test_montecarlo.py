"""Tests of ``orthoccp.montecarlo`` and the ``orthoccp montecarlo`` command (mechanics only).

Tiny runs (logit first stage, 3 folds, 150 units x 6 periods, 5 covariates): the statistics
are checked against hand computations from the replications, not against any target value.
"""

from __future__ import annotations

import json
import math
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import orthoccp as oc
from orthoccp.cli import main
from orthoccp.montecarlo import (
    DEFAULT_ESTIMATORS,
    ESTIMATORS,
    REPLICATION_COLUMNS,
    SUMMARY_COLUMNS,
    MonteCarloResults,
    replication_seeds,
    run_montecarlo,
)
from orthoccp.simulate import scenario_names, simulate

TINY = dict(units=150, periods=6, learner="logit", folds=3, n_covariates=5, seed=7)
REPS = 3
# Columns that hold measured wall times, which differ from run to run.
TIMING = ["seconds"]


@pytest.fixture(scope="module")
def mc() -> MonteCarloResults:
    return run_montecarlo("ebike", reps=REPS, jobs=1, **TINY)  # type: ignore[arg-type]


def _numbers(frame: pd.DataFrame) -> pd.DataFrame:
    return frame.drop(columns=[c for c in TIMING if c in frame.columns])


def test_summary_has_every_column_and_row(mc: MonteCarloResults) -> None:
    s = mc.summary
    assert list(s.columns) == list(SUMMARY_COLUMNS)
    truth = simulate("ebike", units=1, periods=1, seed=0).truth
    assert len(s) == len(DEFAULT_ESTIMATORS) * len(truth)
    assert list(s["estimator"].unique()) == list(DEFAULT_ESTIMATORS)
    assert set(s["parameter"]) == set(truth)
    assert (s["reps"] == REPS).all()
    assert (s["n_ok"] + s["failures"] == s["reps"]).all()
    assert list(mc.replications.columns) == list(REPLICATION_COLUMNS)
    assert len(mc.replications) == REPS * len(DEFAULT_ESTIMATORS) * len(truth)


def test_coverage_is_a_share_with_its_mc_error(mc: MonteCarloResults) -> None:
    s = mc.summary
    ok = s["n_ok"] > 0
    assert ((s.loc[ok, "coverage"] >= 0) & (s.loc[ok, "coverage"] <= 1)).all()
    c, n = s.loc[ok, "coverage"], s.loc[ok, "n_ok"]
    np.testing.assert_allclose(s.loc[ok, "coverage_mcse"], np.sqrt(c * (1 - c) / n))
    assert (s["level"] == 0.95).all()


def test_oracle_statistics_match_a_hand_computation(mc: MonteCarloResults) -> None:
    rep = mc.replications
    truth = simulate("ebike", units=1, periods=1, seed=0).truth
    for param, value in truth.items():
        rows = rep[(rep["estimator"] == "oracle") & (rep["parameter"] == param)]
        rows = rows[~rows["failed"]]
        assert len(rows) > 0
        est, se = rows["estimate"].to_numpy(), rows["std_error"].to_numpy()
        lo, hi = rows["ci_lower"].to_numpy(), rows["ci_upper"].to_numpy()
        np.testing.assert_allclose(lo, est - 1.959963984540054 * se, rtol=1e-12)
        np.testing.assert_allclose(hi, est + 1.959963984540054 * se, rtol=1e-12)
        row = mc.summary.set_index(["estimator", "parameter"]).loc[("oracle", param)]
        assert row["truth"] == value
        assert row["bias"] == pytest.approx(sum(est) / len(est) - value, rel=1e-12)
        assert row["sd"] == pytest.approx(np.std(est, ddof=1), rel=1e-12)
        assert row["mean_se"] == pytest.approx(se.mean(), rel=1e-12)
        assert row["sd_over_se"] == pytest.approx(np.std(est, ddof=1) / se.mean(), rel=1e-12)
        assert row["rmse"] == pytest.approx(math.sqrt(np.mean((est - value) ** 2)), rel=1e-12)
        assert row["coverage"] == pytest.approx(np.mean((lo <= value) & (value <= hi)))
        assert row["mean_ci_length"] == pytest.approx(np.mean(hi - lo), rel=1e-12)


def _exact_replication_zero(units: int = 150) -> tuple[oc.Panel, oc.Model, oc.Nuisances, int]:
    """Replication 0 of a TINY-like run, rebuilt by hand with the simulator's exact nuisances."""
    sim_seed, est_seed = replication_seeds(TINY["seed"], 0)  # type: ignore[arg-type]
    sim = simulate("ebike", units=units, periods=6, seed=sim_seed, n_covariates=5)
    panel = oc.Panel(sim.data, unit=sim.unit, period=sim.period, choice=sim.choice,
                     states=list(sim.states))
    model = oc.Model(anchor=sim.anchor, kind=sim.kind, discount=sim.discount,
                     utility=sim.utility, persistent=sim.persistent)
    order = [list(sim.choices).index(c) for c in panel.choices]
    nuis = oc.nuisances_from_truth(model.bind(panel), sim.ccp[:, order], sim.continuation[:, order])
    return panel, model, nuis, est_seed


def test_oracle_uses_the_exact_nuisances(mc: MonteCarloResults) -> None:
    panel, model, nuis, est_seed = _exact_replication_zero()
    res = oc.estimate(panel, model, nuisances=nuis, debias=False, folds=3, seed=est_seed)
    rep = mc.replications
    got = rep[(rep["rep"] == 0) & (rep["estimator"] == "oracle")].set_index("parameter")
    for param in res.params.index:
        assert got.loc[param, "estimate"] == res.params[param]
        assert got.loc[param, "std_error"] == res.std_errors[param]


def test_oracle_debiased_is_the_corrected_moment_at_the_exact_nuisances() -> None:
    # 300 units: at 150 the corrected solve of replication 0 does not converge.
    options = {**TINY, "units": 300}
    run = run_montecarlo("ebike", reps=1, estimators=("oracle", "oracle_debiased"),
                         **options)  # type: ignore[arg-type]
    panel, model, nuis, est_seed = _exact_replication_zero(units=300)
    res = oc.estimate(panel, model, nuisances=nuis, debias=True, folds=3, seed=est_seed,
                      learner="logit")
    rep = run.replications.set_index(["estimator", "parameter"])
    assert ESTIMATORS[-1] == "oracle_debiased" and "oracle_debiased" not in DEFAULT_ESTIMATORS
    for param in res.params.index:
        row = rep.loc[("oracle_debiased", param)]
        assert row["estimate"] == pytest.approx(res.params[param], rel=1e-12)
        assert row["std_error"] == pytest.approx(res.std_errors[param], rel=1e-12)
        assert row["moments"] == "renewal_robust"
        # The correction terms are not zero at the exact nuisances, only mean zero: the
        # corrected moment moves the estimate and widens the interval relative to the oracle.
        assert row["estimate"] != rep.loc[("oracle", param), "estimate"]
        assert row["std_error"] > 0


def test_failures_are_counted_not_dropped(mc: MonteCarloResults) -> None:
    rep = mc.replications
    for name, count in mc.failures.items():
        failed = rep[(rep["estimator"] == name) & rep["failed"]]
        assert count == failed["rep"].nunique()
        assert failed["estimate"].isna().all() and (failed["error"] != "").all()
        assert (mc.summary.loc[mc.summary["estimator"] == name, "failures"] == count).all()


def test_moments_used_are_recorded(mc: MonteCarloResults) -> None:
    used = mc.summary.groupby("estimator")["moments"].first()
    assert used["naive"] == "standard" and used["oracle"] == "standard"
    if mc.failures["debiased"] < REPS:
        assert used["debiased"] == "renewal_robust"  # renewal scenario with persistent states


def test_jobs_do_not_change_the_numbers(mc: MonteCarloResults) -> None:
    two = run_montecarlo("ebike", reps=REPS, jobs=2, **TINY)  # type: ignore[arg-type]
    pd.testing.assert_frame_equal(_numbers(two.replications), _numbers(mc.replications))
    cols = [c for c in SUMMARY_COLUMNS if c != "median_seconds"]
    pd.testing.assert_frame_equal(two.summary[cols], mc.summary[cols])


def test_a_continued_run_reproduces_the_same_replications(mc: MonteCarloResults) -> None:
    part = run_montecarlo(
        "ebike", reps=1, first_rep=REPS - 1, jobs=1, estimators=("oracle",), **TINY  # type: ignore[arg-type]
    )
    rep = mc.replications
    ref = rep[(rep["rep"] == REPS - 1) & (rep["estimator"] == "oracle")].reset_index(drop=True)
    pd.testing.assert_frame_equal(_numbers(part.replications), _numbers(ref))


def test_json_round_trip_and_concat(mc: MonteCarloResults, tmp_path: Path) -> None:
    path = mc.to_json(tmp_path / "mc.json")
    doc = json.loads(path.read_text())
    assert doc["settings"]["scenario"] == "ebike" and doc["reps"] == REPS
    back = MonteCarloResults.read_json(path)
    pd.testing.assert_frame_equal(back.replications, mc.replications)
    pd.testing.assert_frame_equal(back.summary, mc.summary)
    first = MonteCarloResults(mc.settings, mc.truth, mc.replications[mc.replications["rep"] < 1])
    rest = MonteCarloResults(mc.settings, mc.truth, mc.replications[mc.replications["rep"] >= 1])
    joined = MonteCarloResults.concat([rest, first])
    pd.testing.assert_frame_equal(joined.replications, mc.replications)
    with pytest.raises(oc.InputError, match="two parts"):
        MonteCarloResults.concat([first, first])


def test_csv_views(mc: MonteCarloResults, tmp_path: Path) -> None:
    summary = pd.read_csv(mc.to_csv(tmp_path / "s.csv"))
    assert list(summary.columns) == list(SUMMARY_COLUMNS) and len(summary) == len(mc.summary)
    raw = pd.read_csv(mc.to_csv(tmp_path / "r.csv", which="replications"))
    assert list(raw.columns) == list(REPLICATION_COLUMNS) and len(raw) == len(mc.replications)
    with pytest.raises(oc.InputError, match="which"):
        mc.to_csv(tmp_path / "x.csv", which="both")


def test_plot_writes_a_png(mc: MonteCarloResults, tmp_path: Path) -> None:
    path = mc.plot(tmp_path / "mc.png")
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    # Coverage of exactly 1 and 0 (zero Monte Carlo standard error) still plots.
    rep = mc.replications.copy()
    rep["covers"] = (rep["estimator"] != "naive").astype("boolean").where(~rep["failed"])
    extreme = MonteCarloResults(mc.settings, mc.truth, rep)
    assert set(extreme.summary["coverage"].dropna()) <= {0.0, 1.0}
    assert extreme.plot(tmp_path / "extreme.png").stat().st_size > 0


def test_plot_with_a_broken_matplotlib_says_how_to_repair(
    mc: MonteCarloResults, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setitem(sys.modules, "matplotlib", None)
    monkeypatch.setitem(sys.modules, "matplotlib.figure", None)
    with pytest.raises(ImportError, match=r"pip install 'matplotlib>=3.7'"):
        mc.plot(tmp_path / "mc.png")


@pytest.mark.parametrize(
    ("options", "match"),
    [
        ({"scenario": "bus"}, "valid scenarios are 'ebike', 'ebike3', 'producers'"),
        ({"learner": "xgboost"}, "learner must be one of .*, got 'xgboost'; the Monte Carlo takes registry names only"),
        ({"reps": 0}, "reps must be an integer >= 1"),
        ({"folds": 2}, "folds must be >= 3"),
        ({"estimators": ("naive", "bootstrap")}, "estimators must be distinct names"),
        ({"moments": "robust"}, "moments must be"),
        ({"scenario": "producers", "moments": "renewal_robust"}, "needs a renewal scenario"),
        ({"jobs": 0}, "jobs must be a positive integer or -1"),
        ({"level": 1.5}, "level must be a probability"),
    ],
)
def test_bad_options_fail_before_any_run(options: dict[str, object], match: str) -> None:
    kwargs: dict[str, object] = {"scenario": "ebike", "reps": 1, **TINY, **options}
    scenario = kwargs.pop("scenario")
    with pytest.raises(oc.InputError, match=match):
        run_montecarlo(scenario, **kwargs)  # type: ignore[arg-type]


def test_cli_writes_json_and_csv(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "mc.json"
    code = main([
        "montecarlo", "ebike", "--reps", "2", "--units", "150", "--periods", "6",
        "--learner", "logit", "--folds", "3", "--covariates", "5", "--seed", "7",
        "--estimators", "naive,oracle", "--jobs", "1", "--out", str(out),
        "--replications", str(tmp_path / "raw.csv"),
    ])  # fmt: skip
    captured = capsys.readouterr()
    assert code == 0, captured.err
    doc = json.loads(out.read_text())
    assert doc["settings"]["estimators"] == ["naive", "oracle"] and doc["reps"] == 2
    assert doc["settings"]["moments"] == "auto"
    summary = pd.read_csv(tmp_path / "mc.csv")
    assert list(summary.columns) == list(SUMMARY_COLUMNS)
    assert list(summary["estimator"].unique()) == ["naive", "oracle"]
    assert len(pd.read_csv(tmp_path / "raw.csv")) == 2 * len(summary)  # 2 replications
    assert "coverage" in captured.out and "mc.json" in captured.out


def test_cli_bad_scenario_exits_2_listing_the_names(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    code = main(["montecarlo", "bus", "--out", str(tmp_path / "mc.json")])
    err = capsys.readouterr().err
    assert code == 2
    assert err.startswith("orthoccp: error:") and err.count("\n") == 1
    for name in scenario_names():
        assert repr(name) in err
    assert not (tmp_path / "mc.json").exists()


@pytest.mark.parametrize(
    ("argv", "match"),
    [
        (["--estimators", "naive,foo"], "--estimators"),
        (["--out-of-range"], "unrecognized arguments"),
    ],
)
def test_cli_usage_errors_exit_2(
    argv: list[str], match: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    code = main(["montecarlo", "ebike", "--out", str(tmp_path / "mc.json"), *argv])
    assert code == 2
    assert match in capsys.readouterr().err


def test_cli_out_must_be_json(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code = main(["montecarlo", "ebike", "--reps", "1", "--out", str(tmp_path / "mc.csv")])
    assert code == 2
    assert ".json file name" in capsys.readouterr().err


def test_model_ccp_steps_setting_round_trips_and_is_checked() -> None:
    from orthoccp.montecarlo import MonteCarloSettings

    s = MonteCarloSettings(scenario="producers", units=100, periods=4, model_ccp_steps=2)
    assert MonteCarloSettings.from_dict(s.to_dict()) == s
    # documents written before the option keep their settings (no key, steps 0)
    plain = MonteCarloSettings(scenario="producers", units=100, periods=4)
    assert "model_ccp_steps" not in plain.to_dict()
    assert MonteCarloSettings.from_dict(plain.to_dict()) == plain
    with pytest.raises(oc.InputError, match="pass moments='standard'"):
        run_montecarlo("ebike", reps=1, units=50, periods=4, model_ccp_steps=1)
    with pytest.raises(oc.InputError, match="applies to the 'debiased' estimator"):
        run_montecarlo("producers", reps=1, units=50, periods=4, model_ccp_steps=1,
                       estimators=("naive",))
    with pytest.raises(oc.InputError, match="model_ccp_steps must be an integer >= 0"):
        run_montecarlo("producers", reps=1, units=50, periods=4, model_ccp_steps=-1)
