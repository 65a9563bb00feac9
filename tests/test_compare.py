"""Specification of orthoccp.compare: first stages side by side and the difference test.

The difference test's variance is Var(theta_a - theta_b) from both estimators' per-unit
influence terms (METHOD §6); checked here against a hand computation and, for identical
estimators, against the exact zero.
"""

from __future__ import annotations

import numpy as np
import pytest
from _support import panel_and_model

import orthoccp as oc
from orthoccp.compare import compare, difference_test


@pytest.fixture(scope="module")
def comparison(small_ebike):  # type: ignore[no-untyped-def]
    panel, model, _ = panel_and_model(small_ebike)
    return compare(panel, model, first_stages={"logit": "logit", "lasso": "lasso_logit"}, folds=3)


def test_difference_test_matches_hand_computation(comparison) -> None:  # type: ignore[no-untyped-def]
    a, b = comparison.results["lasso"], comparison.results["logit"]
    t = comparison.tests["lasso"]
    d = a.influence - b.influence
    n = d.shape[0]
    se = np.sqrt(np.diag(n / (n - 1) * d.T @ d))
    np.testing.assert_allclose(t["std_error"], se)
    np.testing.assert_allclose(t["difference"], a.params - b.params)
    w = t.attrs["wald"]
    assert w["df"] == 2 and 0 <= w["p_value"] <= 1


def test_identical_estimators_differ_by_zero(comparison) -> None:  # type: ignore[no-untyped-def]
    a = comparison.results["logit"]
    t = difference_test(a, a)
    np.testing.assert_array_equal(t["difference"], 0.0)
    np.testing.assert_array_equal(t["std_error"], 0.0)


def test_same_seed_same_folds_for_every_first_stage(comparison, small_ebike) -> None:  # type: ignore[no-untyped-def]
    panel, model, _ = panel_and_model(small_ebike)
    alone = oc.estimate(panel, model, learner="logit", folds=3, seed=0)
    np.testing.assert_allclose(comparison.results["logit"].params, alone.params, rtol=1e-12)


def test_views(comparison) -> None:  # type: ignore[no-untyped-def]
    frame = comparison.to_frame()
    assert frame.index.names == ["first_stage", "parameter"]
    assert np.isnan(frame.loc[("logit", "wear_cost"), "diff_vs_baseline"])
    text = comparison.summary()
    assert "baseline: logit" in text and "joint test lasso = logit" in text
    assert "\\toprule" in comparison.to_latex()
    assert "<table" in comparison._repr_html_()


def test_bad_baseline(small_ebike) -> None:  # type: ignore[no-untyped-def]
    panel, model, _ = panel_and_model(small_ebike)
    with pytest.raises(oc.InputError, match="baseline 'probit' is not among the first stages"):
        compare(panel, model, first_stages={"logit": "logit"}, baseline="probit")


class _Broken:
    """A classifier that fails at fit time with the error a data-dependent failure raises."""

    def get_params(self, deep: bool = True) -> dict:  # type: ignore[type-arg]
        return {}

    def set_params(self, **params) -> "_Broken":  # type: ignore[no-untyped-def]
        return self

    def fit(self, X, y):  # type: ignore[no-untyped-def]
        raise oc.EstimationError("this first stage cannot be fitted here")

    def predict_proba(self, X):  # type: ignore[no-untyped-def]
        raise AssertionError("never reached")


def test_a_failed_first_stage_is_shown_and_the_others_go_through(small_ebike) -> None:  # type: ignore[no-untyped-def]
    panel, model, _ = panel_and_model(small_ebike)
    with pytest.warns(oc.OrthoCCPWarning, match="first stage 'broken' failed"):
        cmp = compare(panel, model, first_stages={"logit": "logit", "broken": _Broken()}, folds=3)
    assert list(cmp.results) == ["logit"] and "cannot be fitted" in cmp.failed["broken"]
    frame = cmp.to_frame()
    assert frame.loc[("broken", "wear_cost"), "solution"].startswith("failed: ")
    assert np.isnan(frame.loc[("broken", "wear_cost"), "estimate"])
    assert frame.loc[("logit", "wear_cost"), "solution"] == "newton"
    assert "broken: FAILED, no estimate" in cmp.summary()
    assert "failed" in cmp.to_latex()
    from orthoccp.report import render_report

    page = render_report(cmp)
    assert "First stage broken failed" in page and "cannot be fitted" in page
    # The baseline failing too: no difference tests, and it says so.
    cmp2 = compare(panel, model, first_stages={"broken": _Broken(), "logit": "logit"}, folds=3)
    assert cmp2.tests == {} and "the baseline broken failed" in cmp2.summary()


def test_every_first_stage_failing_raises_the_error(small_ebike) -> None:  # type: ignore[no-untyped-def]
    panel, model, _ = panel_and_model(small_ebike)
    with pytest.raises(oc.EstimationError, match="cannot be fitted"):
        compare(panel, model, first_stages={"broken": _Broken()}, folds=3)
