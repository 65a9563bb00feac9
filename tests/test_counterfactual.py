"""Counterfactuals by fitted value iteration on the data's rows (``orthoccp.counterfactual``).

External checks: on the Su & Judd (2012) bus design (Rust 1987), fitted value iteration with
cell means reproduces the exact solution of the Bellman equation under the empirical transition
matrices (solved by successive approximation and Newton steps, ``reference.solve_bellman``) to
1e-8; the forest and nearest-neighbour averagers stay within the issue's 0.005 mean absolute difference;
and the replacement demand curve (Rust 1987's counterfactual) matches the exact one. On a
simulated scenario the counterfactual change is compared with the simulator's exact re-solve.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import orthoccp as oc
from orthoccp.counterfactual import counterfactual, fit_averager, solve_on_rows
from orthoccp.reference import simulate_bus, solve_bellman
from orthoccp.reference._bus import SU_JUDD_BUS as BUS


@pytest.fixture(scope="module")
def bus():  # type: ignore[no-untyped-def]
    df = simulate_bus(buses=150, periods=80, seed=3)
    panel = oc.Panel(df, unit="bus", period="month", choice="action", states=["mileage"])
    model = oc.Model(kind="renewal", anchor="replace", discount=BUS.discount,
                     utility={"keep": {"theta11": "neg_mileage_k"}, "replace": {"RC_neg": "1"}})
    return df, panel, model


def _empirical(panel: oc.Panel) -> tuple[np.ndarray, np.ndarray, dict[int, int]]:
    """Visited states and the empirical transitions: keep by state, replace pooled."""
    x = panel.frame["mileage"].to_numpy().astype(int)
    codes, nxt = panel.choice_codes, panel.next_row
    states = np.unique(x)
    pos = {int(s): i for i, s in enumerate(states)}
    F = np.zeros((2, states.size, states.size))
    for t in np.flatnonzero(nxt >= 0):
        if codes[t] == 1:
            F[1, :, pos[x[nxt[t]]]] += 1
        else:
            F[0, pos[x[t]], pos[x[nxt[t]]]] += 1
    F /= F.sum(axis=2, keepdims=True)
    return states, F, pos


def _exact_on_rows(panel: oc.Panel, theta: np.ndarray) -> np.ndarray:
    states, F, pos = _empirical(panel)
    u = np.column_stack([-0.001 * theta[0] * states, theta[1] * np.ones(states.size)])
    ccp = solve_bellman(u, F, BUS.discount, tol=1e-13).ccp
    x = panel.frame["mileage"].to_numpy().astype(int)
    return ccp[[pos[int(v)] for v in x]]


def test_cell_means_give_the_exact_solution_under_the_empirical_transitions(bus) -> None:  # type: ignore[no-untyped-def]
    _, panel, model = bus
    bound = model.bind(panel)
    avg = fit_averager(bound, averager="cells")
    assert avg.fallback_rows == {}  # every visited state has its own keep transitions
    theta = np.array([BUS.cost_slope, -BUS.replace_cost])
    sol = solve_on_rows(bound.Z @ theta, avg, BUS.discount)
    np.testing.assert_allclose(sol.ccp, _exact_on_rows(panel, theta), atol=1e-8, rtol=0)


@pytest.mark.parametrize("averager", ["forest", "knn"])
def test_the_learned_averagers_stay_close_to_the_exact_solution(bus, averager: str) -> None:  # type: ignore[no-untyped-def]
    """The default (forest) and nearest-neighbour averagers: visit-weighted mean |difference|
    of the replacement probabilities at most 0.005 (the issue's bound)."""
    _, panel, model = bus
    bound = model.bind(panel)
    theta = np.array([BUS.cost_slope, -BUS.replace_cost])
    sol = solve_on_rows(bound.Z @ theta, fit_averager(bound, averager=averager), BUS.discount)
    assert np.mean(np.abs(sol.ccp[:, 1] - _exact_on_rows(panel, theta)[:, 1])) <= 0.005


def test_the_replacement_demand_curve(bus) -> None:  # type: ignore[no-untyped-def]
    """Rust (1987)'s counterfactual: the replacement rate over the sample's states as the
    replacement cost varies, by cell means against the exact solution (1e-8)."""
    _, panel, model = bus
    bound = model.bind(panel)
    avg = fit_averager(bound, averager="cells")
    rates, exact = [], []
    for rc in (6.0, 9.0, 11.7257, 14.0):
        theta = np.array([BUS.cost_slope, -rc])
        rates.append(solve_on_rows(bound.Z @ theta, avg, BUS.discount).ccp[:, 1].mean())
        exact.append(_exact_on_rows(panel, theta)[:, 1].mean())
    np.testing.assert_allclose(rates, exact, atol=1e-8)
    assert np.all(np.diff(rates) < 0)  # demand falls as the cost rises


@pytest.fixture(scope="module")
def ebike_cf():  # type: ignore[no-untyped-def]
    from orthoccp.simulate import simulate

    sim = simulate("ebike", units=400, periods=8, seed=5)
    panel = sim.panel()
    model = sim.model()
    res = oc.estimate(panel, model, learner="logit", folds=3, moments="standard")
    return sim, panel, model, res


def test_no_change_changes_nothing(ebike_cf) -> None:  # type: ignore[no-untyped-def]
    """A zero shift: the counterfactual is the baseline at every theta, so the difference is
    0 with s.e. 0. (Setting a parameter to its estimate is not "no change": the
    counterfactual then holds it fixed while the baseline moves with the estimate.)"""
    _, panel, model, res = ebike_cf
    cf = counterfactual(res, panel, model, shift={"swap": 0.0}, averager="knn")
    diff = cf.table.xs("difference", level="scenario")
    assert np.all(np.abs(diff["estimate"]) < 1e-9) and np.all(diff["std_error"] < 1e-9)
    shares = cf.table.xs("baseline", level="scenario").loc[["share[keep]", "share[swap]"], "estimate"]
    assert shares.sum() == pytest.approx(1.0, abs=1e-12)


def test_a_subsidy_against_the_simulators_exact_re_solve(ebike_cf) -> None:  # type: ignore[no-untyped-def]
    """A subsidy of 1 util on the swap, evaluated at the true parameters: the change in the
    swap share over the sample's rows by fitted value iteration (nearest neighbours) against
    the simulator's exact solution at the changed payoffs. The averager's error is the only
    difference; 0.01 is the issue's order of accuracy (0.005 per probability) doubled."""
    from orthoccp.simulate._solve import Model as ExactModel, solve

    sim, panel, model, res = ebike_cf
    truth = pd.Series(sim.truth)[list(res.params.index)]
    fake = oc.Results.from_dict({**res.to_dict(), "params": [
        {"name": k, "estimate": float(v), "std_error": 0.1, "ci_lower": 0, "ci_upper": 0, "z": 0,
         "p_value": 1} for k, v in truth.items()]})
    cf = counterfactual(fake, panel, model, shift={"swap": 1.0})
    got = cf.table.loc[("share[swap]", "difference"), "estimate"]
    m = sim.solution.model
    J = m.flow.shape[2]
    swap = list(sim.choices).index("swap")
    flow = m.flow.copy()
    flow[:, :, swap] += 1.0
    exact = solve(ExactModel(flow, m.transitions, m.discount, m.anchor, m.kind))
    rows = (sim.unit_index, sim.state_index)
    want = (exact.ccp[rows][:, swap] - sim.solution.ccp[rows][:, swap]).mean()
    assert J == 2 and want > 0
    assert got == pytest.approx(want, abs=0.01)


def test_the_demand_curve_is_the_counterfactual_at_each_amount(ebike_cf, tmp_path) -> None:  # type: ignore[no-untyped-def]
    """Each point equals counterfactual(shift={choice: amount}); the share rises with the
    subsidy; amount 0 is the baseline (change 0); the figure is written."""
    _, panel, model, res = ebike_cf
    curve = oc.demand_curve(res, panel, model, choice="swap", amounts=[0.0, 0.5, 1.5],
                            averager="knn")
    t = curve.table
    one = counterfactual(res, panel, model, shift={"swap": 1.5}, averager="knn")
    assert t["share"].iloc[-1] == pytest.approx(one.table.loc[("share[swap]", "counterfactual"), "estimate"], rel=1e-10)
    assert t["std_error"].iloc[-1] == pytest.approx(one.table.loc[("share[swap]", "counterfactual"), "std_error"], rel=1e-8)
    assert np.all(np.diff(t["share"]) > 0)
    assert t["change"].iloc[0] == 0.0
    curve.plot(path=tmp_path / "demand.png")
    assert (tmp_path / "demand.png").stat().st_size > 1000


@pytest.mark.parametrize("options, message", [
    (dict(set={"price": 1.0}), "'price' is not a parameter"),
    (dict(shift={"sell": 1.0}), "'sell' is not a choice"),
    (dict(), "no change given"),
    (dict(set={"swap_cost": float("nan")}), "finite number"),
    (dict(set={"swap_cost": -4.0}, averager="tree"), "averager must be one of"),
])
def test_bad_changes_are_named(ebike_cf, options, message) -> None:  # type: ignore[no-untyped-def]
    _, panel, model, res = ebike_cf
    with pytest.raises(oc.InputError, match=message):
        counterfactual(res, panel, model, **options)
