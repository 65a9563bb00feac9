"""The results contract: what every result type of orthoccp promises, checked on each.

Every estimator's record (the CCP ``estimate``, ``estimate_moments``, ``estimate_discrete``
and the full-solution ``nfxp_estimate``) carries ``params`` and ``std_errors`` indexed by the
parameter names, a covariance matrix whose diagonal gives the standard errors, ``n_units``,
normal-approximation intervals, a summary text, a JSON-safe ``to_dict``/``to_json``, and is
frozen. The Monte Carlo record keeps the part of the contract that applies to a study of many
estimates (names, units, text, JSON, frozen). Small seeded runs on invented data (mechanics
only); the reference for the intervals is ``scipy.stats.norm``.
"""

from __future__ import annotations

import dataclasses
import html
import json
import warnings
from collections.abc import Callable
from typing import Any

import numpy as np
import pandas as pd
import pytest
from scipy import stats

import orthoccp as oc
from orthoccp.cell import CellFrequencyRegressor
from orthoccp.custom import Nuisance, estimate_moments
from orthoccp.discrete import estimate_discrete
from orthoccp.montecarlo import MonteCarloResults, run_montecarlo
from orthoccp.reference import SU_JUDD_BUS, nfxp_estimate, simulate_bus
from orthoccp.simulate import simulate


@pytest.fixture(scope="module")
def bus() -> pd.DataFrame:
    return simulate_bus(buses=50, periods=120, seed=1000)


def _ccp(bus: pd.DataFrame) -> tuple[Any, int]:
    sim = simulate("ebike", units=150, periods=5, seed=3)
    return oc.estimate(sim.panel(), sim.model(), learner="logit", folds=3), 150


def _moments(bus: pd.DataFrame) -> tuple[Any, int]:
    rng = np.random.default_rng(3)
    n = 200
    x = rng.integers(0, 4, n)
    d = (rng.random(n) < 0.3 + 0.1 * x).astype(int)
    frame = pd.DataFrame({"id": np.arange(n), "t": 0, "d": d, "x": x.astype(float),
                          "y": 1 + x + 2 * d + rng.standard_normal(n)})
    panel = oc.Panel(frame, unit="id", period="t", choice="d", states=["x"])
    outcome = Nuisance(name="g", target="y", features=["x"], by="d",
                       at={"g1": {"d": 1}, "g0": {"d": 0}}, learner=CellFrequencyRegressor())
    return estimate_moments(panel, lambda th, r, nu: nu["g1"] - nu["g0"] - th[0], [outcome],
                            parameters=["ate"]), n


def _discrete(bus: pd.DataFrame) -> tuple[Any, int]:
    panel = oc.Panel(bus, unit="bus", period="month", choice="action", states=["mileage"])
    return estimate_discrete(panel, utility=SU_JUDD_BUS.utility_spec(),
                             discount=SU_JUDD_BUS.discount, n_states=SU_JUDD_BUS.n_states,
                             transitions="increments", reset_choices=["replace"]), 50


def _nfxp(bus: pd.DataFrame) -> tuple[Any, int]:
    return nfxp_estimate(bus, utility=SU_JUDD_BUS.utility_spec(), transitions="increments",
                         n_states=SU_JUDD_BUS.n_states, state="mileage", choice="action",
                         unit="bus", period="month", choices=("keep", "replace"),
                         anchor="replace", discount=SU_JUDD_BUS.discount), 50


def _game(bus: pd.DataFrame) -> tuple[Any, int]:
    from orthoccp.games import am2007_game, estimate_game, simulate_markets, solve_equilibrium

    panel = simulate_markets(solve_equilibrium(am2007_game(2)), markets=120, periods=3, seed=4)
    return estimate_game(panel, discount=0.95), 120


def _types(bus: pd.DataFrame) -> tuple[Any, int]:
    from orthoccp.types import TypesDesign, estimate_types, simulate_types

    df = simulate_types(TypesDesign(n_states=6), units=150, periods=8, seed=1)
    panel = oc.Panel(df, unit="unit", period="period", choice="choice", states=["x"])
    return estimate_types(panel, utility={"keep": {"wear": "x"}, "replace": {"replace": "1"}},
                          discount=0.95, type_shifts=["replace"], n_states=6, starts=2), 150


ESTIMATORS: dict[str, Callable[[pd.DataFrame], tuple[Any, int]]] = {
    "estimate": _ccp, "estimate_moments": _moments, "estimate_discrete": _discrete,
    "nfxp_estimate": _nfxp, "estimate_game": _game, "estimate_types": _types,
}


@pytest.fixture(scope="module", params=list(ESTIMATORS))
def fitted(request: pytest.FixtureRequest, bus: pd.DataFrame) -> tuple[Any, int]:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # small samples warn; the contract is about the record
        return ESTIMATORS[request.param](bus)


@pytest.fixture(scope="module")
def study() -> MonteCarloResults:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return run_montecarlo("ebike", reps=2, jobs=1, units=150, periods=6, learner="logit",
                              folds=3, n_covariates=5, seed=7, progress=False)


def _assert_frozen(record: Any) -> None:
    assert dataclasses.is_dataclass(record)
    first = dataclasses.fields(record)[0].name
    with pytest.raises(dataclasses.FrozenInstanceError):
        setattr(record, first, None)


def test_estimates_names_and_covariance(fitted: tuple[Any, int]) -> None:
    res, _ = fitted
    names = list(res.params.index)
    assert names and all(isinstance(n, str) and n for n in names) and len(set(names)) == len(names)
    assert isinstance(res.params, pd.Series) and isinstance(res.std_errors, pd.Series)
    assert list(res.std_errors.index) == names
    assert isinstance(res.cov, pd.DataFrame)
    assert list(res.cov.index) == names and list(res.cov.columns) == names
    cov = res.cov.to_numpy()
    assert np.all(np.isfinite(cov)) and np.all(np.isfinite(res.params.to_numpy()))
    np.testing.assert_allclose(cov, cov.T, rtol=1e-10, atol=0)
    assert np.linalg.eigvalsh(cov).min() >= -1e-10 * np.abs(cov).max()
    # A standard error is the square root of the covariance diagonal.
    np.testing.assert_allclose(res.std_errors.to_numpy(), np.sqrt(np.diag(cov)), rtol=1e-12)


def test_units_and_intervals(fitted: tuple[Any, int]) -> None:
    res, n_units = fitted
    assert isinstance(res.n_units, int) and res.n_units == n_units
    ci = res.conf_int(0.9)
    z = stats.norm.ppf(0.95)  # scipy's normal quantile is the outside reference
    np.testing.assert_allclose(ci["lower"], res.params - z * res.std_errors, rtol=1e-12)
    np.testing.assert_allclose(ci["upper"], res.params + z * res.std_errors, rtol=1e-12)
    with pytest.raises(oc.InputError, match="level"):
        res.conf_int(1.5)


def test_summary_names_every_parameter_with_its_estimate(fitted: tuple[Any, int]) -> None:
    res, _ = fitted
    text = res.summary()
    assert isinstance(text, str)
    for name, value in res.params.items():
        line = next((ln for ln in text.splitlines() if ln.split()[:1] == [name]), None)
        assert line is not None, f"{name!r} has no line in the summary"
        assert f"{value:.4f}" in line or f"{value:.5f}" in line


def test_html_view_names_the_estimators_own_settings(fitted: tuple[Any, int]) -> None:
    """The notebook view lists every parameter, and states only what the estimator has: the
    cross-fitted CCP estimator its folds, the others no "0 folds" placeholder."""
    res, _ = fitted
    if not hasattr(res, "_repr_html_"):
        pytest.skip(f"{type(res).__name__} has no notebook view")
    page = res._repr_html_()
    for name in res.params.index:
        assert name in page
    if isinstance(res, oc.Results) and type(res) is oc.Results:
        assert f"{res.folds} folds" in page
    else:
        assert "0 folds" not in page and html.escape(res.method) in page


def test_json_record(fitted: tuple[Any, int]) -> None:
    res, _ = fitted
    doc = json.loads(res.to_json())
    assert doc == json.loads(json.dumps(res.to_dict(), allow_nan=False))
    assert [p["name"] for p in doc["params"]] == list(res.params.index)
    np.testing.assert_allclose([p["estimate"] for p in doc["params"]], res.params, rtol=1e-15)
    np.testing.assert_allclose([p["std_error"] for p in doc["params"]], res.std_errors, rtol=1e-15)
    np.testing.assert_allclose(np.array(doc["cov"], dtype=float), res.cov.to_numpy(), rtol=1e-15)


def test_estimator_records_are_frozen(fitted: tuple[Any, int]) -> None:
    _assert_frozen(fitted[0])


def test_monte_carlo_record(study: MonteCarloResults) -> None:
    _assert_frozen(study)
    names = sorted(study.truth)
    assert names and sorted(set(study.summary["parameter"])) == names
    assert study.settings.units == 150
    text = study.table()
    assert isinstance(text, str) and all(n in text for n in names)
    doc = json.loads(json.dumps(study.to_dict(), allow_nan=False))
    again = MonteCarloResults.from_dict(doc)
    pd.testing.assert_frame_equal(again.summary, study.summary)
