"""Full-solution reference (``orthoccp.reference``): Bellman solver, NFXP likelihood, bus design.

The bus design is Su & Judd (2012, Econometrica 80), based on Rust (1987), with the constants
as quoted in the project's issue (from the paper).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from orthoccp import EULER_GAMMA, InputError
from orthoccp.reference import (
    BUS_CHOICES,
    SU_JUDD_BUS,
    BusDesign,
    NFXPResults,
    bus_transitions,
    nfxp_estimate,
    simulate_bus,
    solve_bellman,
    solve_bus,
)

BUS = dict(
    state="mileage", choice="action", unit="bus", period="month", choices=BUS_CHOICES,
    anchor="replace", discount=0.975,
)


@pytest.fixture(scope="module")
def sample() -> pd.DataFrame:
    return simulate_bus(buses=200, periods=100, seed=11)


@pytest.fixture(scope="module")
def small() -> pd.DataFrame:
    return simulate_bus(buses=20, periods=20, seed=1)


@pytest.fixture(scope="module")
def fit(sample: pd.DataFrame) -> NFXPResults:
    return nfxp_estimate(sample, utility=SU_JUDD_BUS.utility_spec(), transitions="increments",
                         n_states=175, **BUS)


def _increments(df: pd.DataFrame, *, uncensored: bool = False) -> np.ndarray:
    """Observed mileage increments (next mileage minus the post-decision base), linked rows.

    ``uncensored``: only transitions from a base of at most 174 - 4, where the last state
    cannot cap the increment.
    """
    nxt = df.groupby("bus")["mileage"].shift(-1)
    ok = nxt.notna().to_numpy()
    base = np.where(df["action"] == "replace", 0, df["mileage"])
    if uncensored:
        ok = ok & (base <= 174 - 4)
    return (nxt.to_numpy()[ok] - base[ok]).astype(int)


@pytest.mark.parametrize("beta", [0.975, 0.995])
def test_solved_bus_model_satisfies_bellman_and_hotz_miller(beta: float) -> None:
    design = BusDesign(discount=beta)
    sol = solve_bus(design)
    x = np.arange(175)
    theta3 = np.array([0.0937, 0.4475, 0.4459, 0.0127, 0.0002])
    # Expected next-period value written out from the design, independently of the package.
    EV_keep = sum(p * sol.value[np.minimum(x + k, 174)] for k, p in enumerate(theta3))
    EV_replace = sum(p * sol.value[min(k, 174)] for k, p in enumerate(theta3))
    v_keep = -0.001 * 2.4569 * x + beta * EV_keep
    v_replace = np.full(175, -11.7257 + beta * EV_replace)
    bellman = np.logaddexp(v_keep, v_replace) + EULER_GAMMA
    np.testing.assert_allclose(sol.value, bellman, rtol=0, atol=1e-8)
    assert sol.residual < 1e-12
    np.testing.assert_allclose(sol.choice_values, np.column_stack([v_keep, v_replace]), atol=1e-8)
    # Hotz & Miller (1993): V = v_R - ln P_R + gamma_E, with P_R the model's CCP.
    np.testing.assert_allclose(
        sol.value, v_replace - np.log(sol.ccp[:, 1]) + EULER_GAMMA, rtol=0, atol=1e-8
    )
    np.testing.assert_allclose(sol.ccp.sum(axis=1), 1.0, atol=1e-15)
    # Replacement becomes more likely with mileage.
    assert np.all(np.diff(sol.ccp[:, 1]) > 0)


def test_solver_converges_from_any_start_and_warm_start_agrees() -> None:
    U, F = SU_JUDD_BUS.flow_utility(), SU_JUDD_BUS.transitions()
    cold = solve_bellman(U, F, 0.975)
    for V0 in (np.full(175, 1e3), np.full(175, -1e3), cold.value + 1e-3):
        warm = solve_bellman(U, F, 0.975, value0=V0)
        np.testing.assert_allclose(warm.value, cold.value, rtol=0, atol=1e-10)
        assert warm.residual < 1e-12


def test_transition_matrices_of_the_design() -> None:
    F = SU_JUDD_BUS.transitions()
    assert F.shape == (2, 175, 175)
    np.testing.assert_allclose(F.sum(axis=2), 1.0, atol=1e-14)
    np.testing.assert_allclose(F[0, 10, 10:15], SU_JUDD_BUS.increments)
    np.testing.assert_allclose(F[1, 99, :5], SU_JUDD_BUS.increments)
    assert F[0, 173, 174] == pytest.approx(1 - 0.0937)  # increases past 174 stop there
    with pytest.raises(InputError, match="pmf"):
        bus_transitions(np.array([0.5, 0.6]), 10)


def test_simulator_columns_ccps_and_laws(sample: pd.DataFrame) -> None:
    assert list(sample.columns) == [
        "bus", "month", "mileage", "action", "neg_mileage_k", "p_keep", "p_replace"
    ]
    assert len(sample) == 200 * 100 and sample["mileage"].between(0, 174).all()
    sol = solve_bus()
    np.testing.assert_allclose(sample["p_replace"], sol.ccp[sample["mileage"], 1], rtol=0, atol=0)
    np.testing.assert_allclose(sample["neg_mileage_k"], -0.001 * sample["mileage"])
    inc = _increments(sample)
    assert inc.min() >= 0 and inc.max() <= 4
    pd.testing.assert_frame_equal(sample, simulate_bus(buses=200, periods=100, seed=11))
    zero = simulate_bus(buses=5, periods=3, seed=0, initial="zero")
    assert (zero.loc[zero["month"] == 0, "mileage"] == 0).all()


def test_increment_pmf_is_the_sample_frequency(sample: pd.DataFrame, fit: NFXPResults) -> None:
    inc = _increments(sample, uncensored=True)
    assert inc.size > 0.95 * 200 * 99
    freq = np.bincount(inc) / inc.size
    assert fit.transitions.increments is not None
    np.testing.assert_array_equal(fit.transitions.increments, freq)
    np.testing.assert_allclose(fit.transitions.increments, SU_JUDD_BUS.increments, atol=0.01)
    np.testing.assert_allclose(fit.problem.transitions, bus_transitions(freq, 175), atol=1e-15)


def test_frequency_transitions_are_cell_frequencies(sample: pd.DataFrame) -> None:
    res = nfxp_estimate(sample, utility=SU_JUDD_BUS.utility_spec(), transitions="frequency",
                        n_states=175, **BUS)
    d = sample.assign(nxt=sample.groupby("bus")["mileage"].shift(-1)).dropna(subset=["nxt"])
    keep = d[d["action"] == "keep"]
    tab = pd.crosstab(keep["mileage"], keep["nxt"].astype(int), normalize="index")
    F = res.problem.transitions
    np.testing.assert_allclose(F[0][np.ix_(tab.index, tab.columns)], tab.to_numpy(), atol=1e-15)
    # The renewal choice's row is pooled over states: the post-replacement frequencies.
    rep = d.loc[d["action"] == "replace", "nxt"].astype(int).value_counts(normalize=True)
    np.testing.assert_allclose(F[1][:, rep.index], np.tile(rep.to_numpy(), (175, 1)), atol=1e-15)
    assert res.converged and abs(res.params["RC"] - 11.7257) < 3 * res.std_errors["RC"]


def test_analytic_gradient_and_hessian_match_finite_differences(fit: NFXPResults) -> None:
    problem = fit.problem
    for theta in (np.array([1.5, 9.0]), np.array([3.0, 13.0])):
        ev = problem.evaluate(theta)
        fd = np.empty(2)
        fdh = np.empty((2, 2))
        for k in range(2):
            h = 1e-5 * max(1.0, abs(theta[k]))
            e = np.zeros(2)
            e[k] = h
            fd[k] = (problem.loglik(theta + e) - problem.loglik(theta - e)) / (2 * h)
            fdh[:, k] = (problem.gradient(theta + e) - problem.gradient(theta - e)) / (2 * h)
        np.testing.assert_allclose(ev.gradient, fd, rtol=1e-5)
        assert ev.hessian is not None
        np.testing.assert_allclose(ev.hessian, fdh, rtol=1e-5)


def test_nfxp_recovers_the_truth(fit: NFXPResults) -> None:
    assert fit.converged and list(fit.params.index) == ["theta11", "RC"]
    truth = pd.Series(SU_JUDD_BUS.truth)
    z = (fit.params - truth[fit.params.index]) / fit.std_errors
    assert (z.abs() < 3).all(), z
    assert np.max(np.abs(fit.gradient)) / fit.n_obs < 1e-8
    # Inverse information from the Hessian and from the outer product of scores agree in a
    # large sample (information matrix equality); both condition on the transitions.
    opg = fit.problem.opg(fit.problem.evaluate(fit.params.to_numpy()))
    np.testing.assert_allclose(np.sqrt(np.diag(np.linalg.inv(opg))), fit.std_errors, rtol=0.2)
    assert "theta11" in fit.summary() and list(fit.conf_int().columns) == ["lower", "upper"]
    np.testing.assert_allclose(fit.ccp.sum(axis=1), 1.0)


def test_column_utilities_given_matrices_and_row_order(sample: pd.DataFrame, fit: NFXPResults) -> None:
    # The same model written with data columns (defined at every state in this sample) and the
    # estimated matrices passed as given: identical estimates, whatever the row order.
    d = sample.sample(frac=1.0, random_state=0).assign(minus_one=-1.0)
    if d["mileage"].nunique() < 175:
        pytest.skip("sample does not visit every mileage state")
    given = dict(zip(BUS_CHOICES, fit.problem.transitions))
    res = nfxp_estimate(d, utility={"keep": {"theta11": "neg_mileage_k"},
                                    "replace": {"RC": "minus_one"}},
                        transitions=given, **BUS)
    np.testing.assert_allclose(res.params, fit.params, rtol=1e-8)
    np.testing.assert_allclose(res.std_errors, fit.std_errors, rtol=1e-6)


@pytest.mark.parametrize(
    ("change", "match"),
    [
        ({"state": "odometer"}, "state column 'odometer' is not in the data"),
        ({"choices": ("keep", "overhaul")}, "not one of choices"),
        ({"discount": 1.0}, "discount must be in"),
        ({"utility": {"keep": {"c": np.ones(3)}}}, "disagree on the number of states"),
        ({"utility": {"keep": {"c": "1"}, "replace": {"c": "1"}}}, "not all identified"),
        ({"transitions": "kernel"}, "transitions must be"),
        ({"transitions": {"keep": np.eye(175)}}, "no matrix for choice 'replace'"),
        ({"cov": "sandwich"}, "cov must be"),
        ({"start": {"RC": 1.0, "gamma": 0.0}}, "unknown parameter"),
    ],
)
def test_bad_inputs(small: pd.DataFrame, change: dict, match: str) -> None:  # type: ignore[type-arg]
    kw = dict(BUS, utility=SU_JUDD_BUS.utility_spec(), transitions="increments", n_states=175)
    kw.update(change)
    with pytest.raises(InputError, match=match):
        nfxp_estimate(small, **kw)  # type: ignore[arg-type]


def test_column_regressor_must_be_a_function_of_the_state(small: pd.DataFrame) -> None:
    df = small.copy()
    df["noise"] = np.random.default_rng(0).normal(size=len(df))
    with pytest.raises(InputError, match="varies within a value of state"):
        nfxp_estimate(df, utility={"keep": {"c": "noise"}, "replace": {"RC": "1"}},
                      transitions="increments", **BUS)
