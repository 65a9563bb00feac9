"""Smoothed starting CCPs of the discrete-state estimators (``initial_ccp="sieve"`` or a classifier).

Outside references: statsmodels' Logit and MNLogit fitted to the rows on the same basis (the
sieve logit is their maximum-likelihood fit); the closed forms of the Legendre polynomials
L2(z) = (3z^2 - 1)/2 and L3(z) = (5z^3 - 3z)/2 (Abramowitz & Stegun 1964, table 22.9, from
memory); the full-solution NFXP MLE of orthoccp.reference (Rust 1987) for the first-order
equivalence of one pseudo-likelihood step from consistent CCPs and the MLE (Aguirregabiria &
Mira 2002, Proposition 4).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from sklearn.linear_model import LogisticRegression

import orthoccp as oc
from orthoccp.discrete import build_problem, estimate_discrete, state_space
from orthoccp.discrete._scenario import simulate_inventory
from orthoccp.discrete._smooth import sieve_basis, sieve_ccp
from orthoccp.reference import BUS_CHOICES, SU_JUDD_BUS, nfxp_estimate, simulate_bus
from orthoccp.spec import SpecError, parse_spec

BUS = SU_JUDD_BUS


def _bus_pml(panel: oc.Panel, **kw: object) -> oc.Results:
    return estimate_discrete(panel, utility=BUS.utility_spec(), discount=BUS.discount,
                             n_states=BUS.n_states, transitions="increments",
                             reset_choices=["replace"], estimator="pml", **kw)


def test_basis_columns_are_legendre_polynomials() -> None:
    values = pd.DataFrame({"x": np.arange(11.0), "g": list("ab" * 5) + ["c"]})
    basis, labels = sieve_basis(values, 3)
    z = np.linspace(-1.0, 1.0, 11)
    assert labels == ["x^1", "x^2", "x^3", "g=b", "g=c"]
    np.testing.assert_allclose(basis[:, 0], z, atol=1e-14)
    np.testing.assert_allclose(basis[:, 1], (3 * z**2 - 1) / 2, atol=1e-14)
    np.testing.assert_allclose(basis[:, 2], (5 * z**3 - 3 * z) / 2, atol=1e-14)
    np.testing.assert_array_equal(basis[:, 3], (values["g"] == "b").to_numpy(float))
    # The degree is capped at the distinct values minus one; a constant column adds nothing.
    capped, lab = sieve_basis(pd.DataFrame({"x": [0.0, 1.0, 2.0, 1.0], "k": [5, 5, 5, 5]}), 6)
    assert lab == ["x^1", "x^2"] and capped.shape == (4, 2)


def test_binary_sieve_is_the_statsmodels_logit(bus_panel: oc.Panel) -> None:
    problem = build_problem(bus_panel, utility=BUS.utility_spec(), discount=BUS.discount,
                            n_states=BUS.n_states)
    P = sieve_ccp(problem.space, problem.counts, 3)
    basis, _ = sieve_basis(problem.space.values, 3)
    X = sm.add_constant(basis)
    y = problem.row_choice == list(problem.choices).index("replace")
    ref = sm.Logit(y.astype(float), X[problem.space.codes]).fit(disp=0, tol=1e-12, maxiter=200)
    j = list(problem.choices).index("replace")
    np.testing.assert_allclose(P[:, j], ref.predict(X), rtol=1e-6, atol=1e-12)


def test_three_choice_sieve_is_the_statsmodels_mnlogit() -> None:
    df = simulate_inventory(units=300, periods=20, seed=7)
    panel = oc.Panel(df, unit="shop", period="period", choice="order", states=["stock"])
    space = state_space(panel)
    counts = np.zeros((space.n_states, len(panel.choices)))
    np.add.at(counts, (space.codes, panel.choice_codes), 1.0)
    P = sieve_ccp(space, counts, 2)
    basis, _ = sieve_basis(space.values, 2)
    X = sm.add_constant(basis)
    ref = sm.MNLogit(panel.choice_codes, X[space.codes]).fit(disp=0, method="newton",
                                                              tol=1e-12, maxiter=200)
    np.testing.assert_allclose(P, ref.predict(X), rtol=1e-6, atol=1e-10)


def test_classifier_start_uses_the_fitted_probabilities(bus_panel: oc.Panel) -> None:
    # An (almost) unpenalised logistic regression on mileage is the statsmodels Logit on (1, x).
    clf = LogisticRegression(C=1e10, tol=1e-12, max_iter=10_000)
    res = _bus_pml(bus_panel, initial_ccp=clf)
    given = _bus_pml(bus_panel, initial_ccp=_logit_ccp(bus_panel))
    assert res.initial_ccp == "LogisticRegression (initial CCPs)"
    np.testing.assert_allclose(res.params.to_numpy(), given.params.to_numpy(), rtol=1e-4)


def _logit_ccp(panel: oc.Panel) -> np.ndarray:
    x = panel.frame["mileage"].to_numpy(float)
    j = list(panel.choices).index("replace")
    y = (panel.choice_codes == j).astype(float)
    ref = sm.Logit(y, sm.add_constant(x)).fit(disp=0, tol=1e-12, maxiter=200)
    p = ref.predict(sm.add_constant(np.arange(BUS.n_states, dtype=float)))
    P = np.empty((BUS.n_states, 2))
    P[:, j], P[:, 1 - j] = p, 1 - p
    return P


def test_one_step_from_the_sieve_is_close_to_the_mle(bus_frame: pd.DataFrame,
                                                     bus_panel: oc.Panel) -> None:
    # First-order equivalence (A&M 2002, Prop. 4): the gap is o_p(n^-1/2). The 0.25 SE
    # tolerance is common practice for "close" here (benchmarks/sieve_reference.py: median
    # gap about 0.1 SE at this size).
    mle = nfxp_estimate(bus_frame, state="mileage", choice="action", unit="bus", period="month",
                        choices=BUS_CHOICES, anchor="replace", utility=BUS.utility_spec(),
                        discount=BUS.discount, transitions="increments", n_states=BUS.n_states)
    res = _bus_pml(bus_panel, initial_ccp="sieve")
    assert res.initial_ccp == "logit sieve of degree 3 (initial CCPs)"
    for name in ("theta11", "RC"):
        gap = abs(res.params[name] - mle.params[name]) / mle.std_errors[name]
        assert gap < 0.25, (name, gap)
        assert res.std_errors[name] == pytest.approx(mle.std_errors[name], rel=0.15)
    assert "initial_ccp_s" in res.timings


def test_bad_initial_ccp_options(bus_panel: oc.Panel) -> None:
    with pytest.raises(oc.InputError, match="initial_ccp must be 'frequency', 'sieve'"):
        _bus_pml(bus_panel, initial_ccp="kernel")
    with pytest.raises(oc.InputError, match="sieve_degree must be an integer >= 1, got 0"):
        _bus_pml(bus_panel, initial_ccp="sieve", sieve_degree=0)
    with pytest.raises(oc.InputError, match="has no fit\(\) method"):
        _bus_pml(bus_panel, initial_ccp=object())


def test_spec_passes_the_initial_ccp_options(bus_frame: pd.DataFrame) -> None:
    doc = {"data": {"unit": "bus", "period": "month", "choice": "action",
                    "states": ["mileage"]},
           "model": {"discount": 0.975},
           "utility": {"keep": {"theta11": "neg_mileage_k"}, "replace": {"RC": "1"}},
           "estimator": {"method": "pml", "n_states": 175, "initial_ccp": "sieve",
                         "sieve_degree": 4}}
    opts = parse_spec(doc).discrete_options(bus_frame)
    assert opts["initial_ccp"] == "sieve" and opts["sieve_degree"] == 4
    doc["estimator"]["initial_ccp"] = "kernel"
    with pytest.raises(SpecError, match="initial_ccp"):
        parse_spec(doc)
