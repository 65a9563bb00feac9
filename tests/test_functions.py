"""Functions of the parameters with delta-method intervals (``orthoccp.functions``).

Checked against a reference library (statsmodels' Wald contrast of a fitted logit on the
Spector & Mazzeo data shipped with statsmodels) and the textbook delta-method formula for a
ratio, se = sqrt(g'Vg) with g = (1/b, -a/b^2) (e.g. Greene, Econometric Analysis, the delta
method; formula from memory).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

import orthoccp as oc
from orthoccp.functions import delta_method


@pytest.fixture(scope="module")
def spector():  # type: ignore[no-untyped-def]
    data = sm.datasets.spector.load_pandas()
    X = sm.add_constant(data.exog, prepend=True)
    fit = sm.Logit(data.endog, X).fit(disp=0)
    return fit, fit.params, fit.cov_params()


def test_a_linear_function_matches_statsmodels_wald_contrast(spector) -> None:  # type: ignore[no-untyped-def]
    """For a linear form the delta method is exact: estimate and s.e. equal statsmodels'
    ``t_test`` of the same contrast (central differences of a linear function: rounding only)."""
    fit, params, cov = spector
    table, _ = delta_method(params, cov, {"c": "GPA - 2 * TUCE + 0.5"})
    ref = fit.t_test("GPA - 2 * TUCE = -0.5")
    assert table.loc["c", "estimate"] == pytest.approx(params["GPA"] - 2 * params["TUCE"] + 0.5, rel=1e-12)
    assert table.loc["c", "std_error"] == pytest.approx(float(np.squeeze(ref.sd)), rel=1e-8)
    # the z statistic of c = 0 is statsmodels' statistic of GPA - 2 TUCE = -0.5
    assert table.loc["c", "z"] == pytest.approx(float(np.squeeze(ref.tvalue)), rel=1e-8)


def test_a_ratio_matches_the_textbook_formula(spector) -> None:  # type: ignore[no-untyped-def]
    """se(a/b) = sqrt(g'Vg), g = (1/b, -a/b^2): central differences with step 1e-6(1+|theta|)
    have relative error O(h^2), far below 1e-6."""
    _, params, cov = spector
    a, b = params["GPA"], params["PSI"]
    g = np.array([1 / b, -a / b**2])
    V = cov.loc[["GPA", "PSI"], ["GPA", "PSI"]].to_numpy()
    want = np.sqrt(g @ V @ g)
    # PSI's |z| is 2.2 here, so the ratio also gets the weak-denominator warning
    with pytest.warns(oc.OrthoCCPWarning, match="divides by PSI"):
        table, C = delta_method(params, cov, {"r": "GPA / PSI",
                                              "same": lambda t: t["GPA"] / t["PSI"]})
    assert table.loc["r", "estimate"] == pytest.approx(a / b, rel=1e-12)
    assert table.loc["r", "std_error"] == pytest.approx(want, rel=1e-6)
    assert table.loc["same", "std_error"] == pytest.approx(want, rel=1e-6)
    assert C.loc["r", "same"] == pytest.approx(want**2, rel=1e-6)
    lo, hi = table.loc["r", ["ci_lower", "ci_upper"]]
    assert (hi - lo) / 2 == pytest.approx(1.959963984540054 * want, rel=1e-6)  # z_0.975, a handbook constant


def test_functions_of_elementary_calls(spector) -> None:  # type: ignore[no-untyped-def]
    """exp, log, sqrt and powers: d/dx exp(x) = exp(x), so se(exp(b)) = exp(b) se(b)."""
    _, params, cov = spector
    se = np.sqrt(cov.loc["PSI", "PSI"])
    table, _ = delta_method(params, cov, {"e": "exp(PSI)", "s": "sqrt(GPA) ** 2"})
    assert table.loc["e", "std_error"] == pytest.approx(np.exp(params["PSI"]) * se, rel=1e-6)
    assert table.loc["s", "estimate"] == pytest.approx(params["GPA"], rel=1e-12)
    assert table.loc["s", "std_error"] == pytest.approx(np.sqrt(cov.loc["GPA", "GPA"]), rel=1e-6)


@pytest.mark.parametrize("functions, message", [
    ({"x": "__import__('os').getcwd()"}, "not allowed"),
    ({"x": "GPA.real"}, "not allowed"),
    ({"x": "price / GPA"}, "'price' is not a parameter"),
    ({"x": "GPA /"}, "not an expression"),
    ({"x": 3}, "expression string or a callable"),
    ({}, "non-empty mapping"),
    ({"x": "log(-GPA - 100)"}, "cannot be evaluated"),
])
def test_bad_functions_are_named(spector, functions, message) -> None:  # type: ignore[no-untyped-def]
    _, params, cov = spector
    with pytest.raises(oc.InputError, match=message):
        delta_method(params, cov, functions)


def test_a_ratio_over_a_weak_parameter_warns() -> None:
    params = pd.Series({"a": 1.0, "b": 0.2})
    cov = pd.DataFrame(np.diag([0.01, 0.01]), index=params.index, columns=params.index)
    with pytest.warns(oc.OrthoCCPWarning, match="divides by b, which is within 3 standard errors"):
        delta_method(params, cov, {"r": "a / b"})


def test_results_derive_and_the_summary_use_the_estimate_covariance() -> None:
    from orthoccp.simulate import simulate

    sim = simulate("ebike", units=200, periods=5, seed=4)
    panel = oc.Panel(sim.data, unit=sim.unit, period=sim.period, choice=sim.choice,
                     states=list(sim.states))
    res = oc.estimate(panel, sim.model(), learner="logit", folds=3, moments="standard")
    got = res.derive({"d": "wear_cost - swap_cost"})
    a = np.array([1.0, -1.0])
    assert got.loc["d", "std_error"] == pytest.approx(np.sqrt(a @ res.cov.to_numpy() @ a), rel=1e-8)
    text = res.summary(functions={"d": "wear_cost - swap_cost"})
    assert "functions of the parameters (delta method" in text
    assert f"{got.loc['d', 'estimate']:.4f}" in text
