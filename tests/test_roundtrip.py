"""Results that travel: ``to_json`` then ``Results.from_json`` keeps every number.

For every result type (CCP debiased and plug-in, with splits and renewal-robust moments; user
moments with Hansen's J; the discrete-state estimator; the command line's JSON), the reloaded
record writes back the identical JSON, and the difference test on reloaded results equals the
one on the originals exactly.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

import orthoccp as oc
from orthoccp.cell import CellFrequencyRegressor
from orthoccp.discrete import estimate_discrete
from orthoccp.discrete._scenario import INVENTORY, simulate_inventory
from orthoccp.simulate import simulate


@pytest.fixture(scope="module")
def ebike():  # type: ignore[no-untyped-def]
    sim = simulate("ebike", units=250, periods=6, seed=4)
    panel = oc.Panel(sim.data, unit=sim.unit, period=sim.period, choice=sim.choice,
                     states=list(sim.states))
    return sim, panel


def _ccp(ebike: Any, **options: Any) -> oc.Results:
    sim, panel = ebike
    return oc.estimate(panel, sim.model(), learner="logit", folds=3, **options)


def _moments() -> oc.Results:
    rng = np.random.default_rng(3)
    n = 400
    x = rng.integers(0, 4, n)
    d = (rng.random(n) < np.array([0.2, 0.4, 0.6, 0.8])[x]).astype(int)
    y = 1.0 + x + 2.0 * d + rng.standard_normal(n)
    panel = oc.Panel(pd.DataFrame({"id": np.arange(n), "t": 0, "d": d, "x": x.astype(float), "y": y}),
                     unit="id", period="t", choice="d", states=["x"])
    g = oc.Nuisance(name="g", target="y", features=["x"], by="d", at={"g1": {"d": 1}, "g0": {"d": 0}},
                    learner=CellFrequencyRegressor(), dictionary="saturated")

    def two(theta: np.ndarray, rows: Any, nu: dict[str, np.ndarray]) -> np.ndarray:
        e = nu["g1"] - nu["g0"] - theta[0]
        return np.column_stack([e, e * (rows["x"] - 1.5)])

    return oc.estimate_moments(panel, two, [g], parameters=["ate"], seed=0, penalty=0.0)


def _discrete() -> oc.Results:
    df = simulate_inventory(units=150, periods=6, seed=7)
    panel = oc.Panel(df, unit="shop", period="period", choice="order", states=["stock"])
    return estimate_discrete(panel, utility=INVENTORY.utility_spec(), discount=INVENTORY.discount,
                             n_states=INVENTORY.n_states)


CASES = {
    "ccp debiased": lambda e: _ccp(e, moments="standard"),
    "ccp renewal-robust, 2 splits": lambda e: _ccp(e, splits=2),
    "ccp plug-in": lambda e: _ccp(e, debias=False),
    "user moments": lambda e: _moments(),
    "discrete": lambda e: _discrete(),
}


@pytest.mark.filterwarnings("ignore::orthoccp.OrthoCCPWarning")
@pytest.mark.parametrize("case", sorted(CASES))
def test_every_number_round_trips(ebike, case: str, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    res = CASES[case](ebike)
    text = res.to_json()
    (tmp_path / "r.json").write_text(text)
    back = oc.Results.from_json(tmp_path / "r.json")
    assert back.to_json() == text
    pd.testing.assert_series_equal(back.params, res.params)
    pd.testing.assert_frame_equal(back.cov, res.cov)
    np.testing.assert_array_equal(back.influence, res.influence)
    assert [oc.Results.from_json(text).params.tolist()] == [res.params.tolist()]
    if getattr(res.details, "split_params", None) is not None:
        pd.testing.assert_frame_equal(back.split_params, res.split_params)
    assert type(back) is type(res) and type(back.details) is type(res.details)
    # the summary of a reloaded record names where it came from
    assert "reloaded from JSON" in back.summary()
    # the difference test reads the reloaded influence terms like the originals'
    same = oc.difference_test(back, res)
    assert (same["difference"] == 0).all() and (same["std_error"] == 0).all()
    derived = back.derive({"first": f"{res.params.index[0]} * 2"})
    assert derived["estimate"].iloc[0] == pytest.approx(2 * res.params.iloc[0], rel=1e-15)


@pytest.mark.filterwarnings("ignore::orthoccp.OrthoCCPWarning")
def test_the_difference_test_of_reloaded_results_is_the_original(ebike) -> None:  # type: ignore[no-untyped-def]
    a, b = _ccp(ebike, moments="standard"), _ccp(ebike, moments="standard", seed=1)
    want = oc.difference_test(a, b)
    got = oc.difference_test(oc.Results.from_json(a.to_json()), oc.Results.from_json(b.to_json()))
    pd.testing.assert_frame_equal(got, want)
    assert got.attrs["wald"] == want.attrs["wald"]


def test_the_command_lines_json_reloads(tmp_path: Path) -> None:
    from orthoccp.cli import main

    assert main(["simulate", "ebike", "--units", "200", "--periods", "5", "--out",
                 str(tmp_path / "p.csv")]) == 0
    assert main(["estimate", str(tmp_path / "p.csv"), "--spec", str(tmp_path / "p.toml"),
                 "--learner", "logit", "--folds", "3", "--json", str(tmp_path / "r.json")]) == 0
    doc = json.loads((tmp_path / "r.json").read_text())
    back = oc.Results.from_json(tmp_path / "r.json")
    assert back.params.tolist() == [p["estimate"] for p in doc["params"]]
    assert back.to_dict()["inputs"] == doc["inputs"]


@pytest.mark.parametrize("source, message", [
    ('{"params": []}', "not an orthoccp results record"),
    # the first format kept the CCP estimator's settings at the top level for every estimator
    ('{"format": "orthoccp.results/1"}', r"format 'orthoccp.results/1'.*write it again"),
    ("{not json", "does not parse"),
    ("no/such/file.json", "cannot read results file"),
])
def test_bad_sources_are_named(source: str, message: str) -> None:
    with pytest.raises(oc.InputError, match=message):
        oc.Results.from_json(source)
