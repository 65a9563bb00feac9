"""Specification of orthoccp.diagnostics: tables attached to every result."""

from __future__ import annotations

import numpy as np
import pytest
from _support import panel_and_model
from sklearn.metrics import brier_score_loss, log_loss

import orthoccp as oc


@pytest.fixture(scope="module")
def result(small_ebike):  # type: ignore[no-untyped-def]
    panel, model, _ = panel_and_model(small_ebike)
    return oc.estimate(panel, model, learner="logit", folds=3)


def test_fold_quality_matches_scikit_learn_metrics(result, small_ebike) -> None:  # type: ignore[no-untyped-def]
    """Log-loss and Brier score per fold agree with scikit-learn's implementations."""
    d = result.diagnostics
    assert list(d.ccp_quality["fold"]) == [0, 1, 2]
    assert d.ccp_quality["rows"].sum() == result.n_rows
    # The no-information baseline (choice frequencies), pooled over folds.
    panel, _, _ = panel_and_model(small_ebike)
    y = panel.choice_codes
    freq = np.bincount(y) / y.size
    folds = result.diagnostics.ccp_quality
    total = (folds["log_loss_baseline"] * folds["rows"]).sum() / folds["rows"].sum()
    assert total == pytest.approx(log_loss(y, np.tile(freq, (y.size, 1))), rel=1e-10)
    brier = (folds["brier_baseline"] * folds["rows"]).sum() / folds["rows"].sum()
    # Multiclass Brier as the sum over classes; binary: twice sklearn's positive-class score.
    assert brier == pytest.approx(2 * brier_score_loss(y, np.full(y.size, freq[1])), rel=1e-10)


def test_tables_have_expected_shape(result) -> None:  # type: ignore[no-untyped-def]
    d = result.diagnostics
    assert set(d.overlap.index) == {"keep", "swap"}
    assert (d.overlap["q01"] <= d.overlap["q99"]).all()
    cal = d.calibration
    assert set(cal["choice"]) == {"keep", "swap"} and cal.groupby("choice")["rows"].sum().eq(result.n_rows).all()
    assert set(d.continuation_quality["choice"]) == {"keep", "swap"}
    shares = d.influential_units.groupby("parameter")["variance_share"].sum()
    assert ((shares > 0) & (shares <= 1 + 1e-12)).all()
    readings = d.readings()
    assert any("log-loss" in r for r in readings) and any("Influence" in r for r in readings)
    assert "diagnostics" in result.summary()


def test_rare_anchor_after_renewal_is_read_and_warned() -> None:
    """Su & Judd (2012) bus design: right after a replacement the exact replacement probability
    is of order 1e-5 (``p_replace`` column of the simulator), so the CCP correction's 1/P_R is
    unreliable; the standard debiased estimate warns, and every result's diagnostics read it."""
    from orthoccp.cell import CellFrequencyClassifier, CellFrequencyRegressor
    from orthoccp.reference import SU_JUDD_BUS, simulate_bus

    frame = simulate_bus(buses=50, periods=120, seed=1000)
    panel = oc.Panel(frame, unit="bus", period="month", choice="action", states=["mileage"])
    model = oc.Model(
        anchor="replace", kind="renewal", discount=SU_JUDD_BUS.discount,
        utility={"keep": {"theta11": "neg_mileage_k"}, "replace": {"replace_cost": "1"}},
    )
    learners = dict(learner=CellFrequencyClassifier(), regressor=CellFrequencyRegressor(), folds=3)
    # The warning comes before the solve, which such probabilities can break.
    with pytest.warns(oc.OrthoCCPWarning, match=r"anchor choice 'replace' is so rare right after a renewal"):
        try:
            oc.estimate(panel, model, **learners)
        except oc.EstimationError:
            pass
    res = oc.estimate(panel, model, debias=False, **learners)
    chk = res.diagnostics.anchor
    # Cell frequencies see almost no second replacement right after one: P_R is clipped there.
    assert chk is not None and chk.kind == "renewal" and chk.median < 1e-3
    assert chk.warning is not None and f"its median estimate there is {chk.median:.2g}, below 0.001" in chk.warning
    after = (panel.choice_codes == panel.choice_index("replace")) & (panel.next_row >= 0)
    assert chk.n_rows == int(after.sum())
    assert any(r.startswith("Anchor probability at the states right after a renewal") for r in res.diagnostics.readings())


def test_diagnostics_travel_in_the_json(small_ebike) -> None:  # type: ignore[no-untyped-def]
    """Every diagnostic table reaches the JSON record (the command line's --json) row for row."""
    import json

    import orthoccp as oc
    from _support import panel_and_model

    panel, model, _ = panel_and_model(small_ebike)
    res = oc.estimate(panel, model, learner="logit", folds=3, seed=0)
    doc = json.loads(res.to_json())["details"]["diagnostics"]
    d = res.diagnostics
    assert doc["readings"] == d.readings()
    for name in ("ccp_quality", "calibration", "continuation_quality", "influential_units"):
        assert len(doc[name]) == len(getattr(d, name)), name
    assert [r["choice"] for r in doc["overlap"]] == [str(c) for c in d.overlap.index]
