"""Cell-frequency first stages (``orthoccp.cell``): cell means, smoothing, unseen cells, API."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from sklearn.base import clone

import orthoccp as oc
from orthoccp.cell import CellFrequencyClassifier, CellFrequencyRegressor
from orthoccp.learners import checked_proba, resolve_learners


@pytest.fixture(scope="module")
def cells() -> pd.DataFrame:
    rng = np.random.default_rng(7)
    n = 600
    return pd.DataFrame(
        {
            "x": rng.integers(0, 8, n).astype(float),
            "z": rng.integers(0, 3, n).astype(float),
            "a": rng.choice(np.array(["stay", "go", "wait"]), n, p=[0.6, 0.3, 0.1]),
            "y": rng.normal(size=n),
        }
    )


@pytest.mark.parametrize("cols", [["x"], ["x", "z"]])
def test_classifier_matches_groupby_frequencies(cells: pd.DataFrame, cols: list[str]) -> None:
    clf = CellFrequencyClassifier().fit(cells[cols].to_numpy(), cells["a"].to_numpy())
    ref = pd.crosstab([cells[c] for c in cols], cells["a"], normalize="index")
    got = clf.predict_proba(ref.index.to_frame().to_numpy())
    assert list(clf.classes_) == sorted(cells["a"].unique()) == list(ref.columns)
    np.testing.assert_allclose(got, ref.to_numpy(), rtol=0, atol=1e-15)
    assert clf.n_cells_ == len(ref)
    # Row by row too: every training row gets its own cell's frequency.
    rows = clf.predict_proba(cells[cols].to_numpy())
    expect = ref.reindex(pd.MultiIndex.from_frame(cells[cols]) if len(cols) > 1 else cells[cols[0]])
    np.testing.assert_allclose(rows, expect.to_numpy(), rtol=0, atol=1e-15)


def test_classifier_smoothing_formula(cells: pd.DataFrame) -> None:
    alpha = 0.5
    clf = CellFrequencyClassifier(alpha=alpha).fit(cells[["x"]], cells["a"])
    counts = pd.crosstab(cells["x"], cells["a"])
    K = counts.shape[1]
    expect = (counts + alpha).div(counts.sum(axis=1) + K * alpha, axis=0)
    np.testing.assert_allclose(clf.predict_proba(counts.index.to_numpy()[:, None]), expect.to_numpy())
    # Smoothing keeps every probability strictly inside (0, 1).
    assert clf.predict_proba(cells[["x"]]).min() > 0


def test_proba_rows_sum_to_one_and_columns_follow_classes() -> None:
    X = np.array([[0.0], [0.0], [1.0], [1.0], [2.0]])
    y = np.array([5, 2, 2, 2, 9])
    clf = CellFrequencyClassifier().fit(X, y)
    assert clf.classes_.tolist() == [2, 5, 9]
    P = clf.predict_proba(np.array([[0.0], [1.0], [2.0], [7.0]]))
    np.testing.assert_allclose(P.sum(axis=1), 1.0)
    np.testing.assert_allclose(P[0], [0.5, 0.5, 0.0])
    np.testing.assert_allclose(P[2], [0.0, 0.0, 1.0])
    assert clf.predict(np.array([[1.0], [2.0]])).tolist() == [2, 9]
    # orthoccp aligns columns to choice codes through classes_: a code absent from the
    # training rows gets a zero column.
    codes = CellFrequencyClassifier().fit(X, np.array([0, 2, 2, 2, 0]))
    aligned = checked_proba(codes, X, 3, 0)
    np.testing.assert_allclose(aligned[:, [0, 2]], codes.predict_proba(X))
    assert np.all(aligned[:, 1] == 0)


def test_unseen_cell_uses_nearest_seen_value_for_one_column() -> None:
    X = np.array([[0.0], [0.0], [4.0], [10.0]])
    y = np.array([0, 1, 1, 0])
    clf = CellFrequencyClassifier().fit(X, y)
    reg = CellFrequencyRegressor().fit(X, np.array([1.0, 3.0, 7.0, 20.0]))
    Xq = np.array([[1.0], [2.0], [3.0], [7.0], [-5.0], [50.0]])
    # 1 -> 0, 2 -> tie between 0 and 4 goes to the smaller, 3 -> 4, 7 -> tie (4), -5 -> 0, 50 -> 10.
    np.testing.assert_allclose(reg.predict(Xq), [2.0, 2.0, 7.0, 7.0, 2.0, 20.0])
    np.testing.assert_allclose(clf.predict_proba(Xq)[:, 1], [0.5, 0.5, 1.0, 1.0, 0.5, 0.0])
    assert clf.unseen(Xq).all() and not clf.unseen(X).any()


def test_unseen_cell_uses_pooled_frequency_with_several_columns(cells: pd.DataFrame) -> None:
    X = cells[["x", "z"]].to_numpy()
    clf = CellFrequencyClassifier(alpha=1.0).fit(X, cells["a"])
    reg = CellFrequencyRegressor().fit(X, cells["y"])
    new = np.array([[100.0, 0.0], [0.0, 100.0]])
    counts = cells["a"].value_counts().sort_index()
    pooled = (counts + 1.0) / (counts.sum() + 3.0)
    np.testing.assert_allclose(clf.predict_proba(new), np.tile(pooled.to_numpy(), (2, 1)))
    np.testing.assert_allclose(reg.predict(new), cells["y"].mean())
    # The pooled rule can be chosen for one column as well.
    one = CellFrequencyRegressor(fallback="pooled").fit(cells[["x"]], cells["y"])
    assert one.predict(np.array([[3.5]]))[0] == pytest.approx(cells["y"].mean())


@pytest.mark.parametrize("cols", [["x"], ["x", "z"]])
def test_regressor_matches_groupby_means(cells: pd.DataFrame, cols: list[str]) -> None:
    reg = CellFrequencyRegressor().fit(cells[cols].to_numpy(), cells["y"].to_numpy())
    means = cells.groupby(cols)["y"].mean()
    got = reg.predict(means.index.to_frame().to_numpy())
    np.testing.assert_allclose(got, means.to_numpy(), rtol=1e-13, atol=1e-14)


def test_sample_weight_equals_repeating_rows(cells: pd.DataFrame) -> None:
    rng = np.random.default_rng(3)
    w = rng.integers(0, 4, len(cells))
    X, rep = cells[["x", "z"]].to_numpy(), np.repeat(np.arange(len(cells)), w)
    clf_w = CellFrequencyClassifier(alpha=0.3).fit(X, cells["a"], sample_weight=w)
    clf_r = CellFrequencyClassifier(alpha=0.3).fit(X[rep], cells["a"].to_numpy()[rep])
    np.testing.assert_allclose(clf_w.predict_proba(X), clf_r.predict_proba(X), atol=1e-14)
    reg_w = CellFrequencyRegressor().fit(X, cells["y"], sample_weight=w)
    reg_r = CellFrequencyRegressor().fit(X[rep], cells["y"].to_numpy()[rep])
    np.testing.assert_allclose(reg_w.predict(X), reg_r.predict(X), atol=1e-13)


@pytest.mark.parametrize(
    ("make", "fit_args", "match"),
    [
        (lambda: CellFrequencyClassifier(alpha=-1.0), None, "alpha must be"),
        (lambda: CellFrequencyClassifier(fallback="closest"), None, "fallback must be"),
        (lambda: CellFrequencyRegressor(fallback="nearest"), "2d", "needs exactly one state column"),
        (lambda: CellFrequencyRegressor(), "nan", "NaN"),
        (lambda: CellFrequencyClassifier(), "zero_weights", "zero for every row"),
    ],
)
def test_bad_inputs(make, fit_args, match) -> None:  # type: ignore[no-untyped-def]
    X = np.array([[0.0, 1.0], [1.0, 1.0], [2.0, 0.0]])
    y = np.array([0, 1, 1])
    kw = {}
    if fit_args is None or fit_args == "zero_weights":
        X = X[:, :1]
        if fit_args == "zero_weights":
            kw = {"sample_weight": np.zeros(3)}
    elif fit_args == "nan":
        X = np.array([[0.0], [np.nan], [1.0]])
    with pytest.raises(ValueError, match=match):
        make().fit(X, y, **kw)


def test_predict_checks_fit_and_feature_count() -> None:
    from sklearn.exceptions import NotFittedError

    with pytest.raises(NotFittedError):
        CellFrequencyClassifier().predict_proba(np.zeros((2, 1)))
    reg = CellFrequencyRegressor().fit(np.zeros((3, 2)), np.ones(3))
    with pytest.raises(ValueError, match="features"):
        reg.predict(np.zeros((2, 3)))


def test_scikit_learn_estimator_checks() -> None:
    from sklearn.utils.estimator_checks import check_estimator

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for est in (CellFrequencyClassifier(alpha=0.5), CellFrequencyRegressor()):
            check_estimator(est)


def test_usable_as_orthoccp_first_stage() -> None:
    from orthoccp.reference import simulate_bus

    df = simulate_bus(buses=40, periods=30, seed=2)
    pair = resolve_learners(CellFrequencyClassifier(alpha=1.0), CellFrequencyRegressor())
    rng = np.random.default_rng(0)
    clf = pair.new_classifier(rng)
    assert clf is not pair.classifier and clone(clf).get_params() == {"alpha": 1.0, "fallback": "auto"}
    panel = oc.Panel(df, unit="bus", period="month", choice="action", states=["mileage"])
    model = oc.Model(
        anchor="replace", kind="renewal", discount=0.975,
        utility={"keep": {"theta11": "neg_mileage_k"}, "replace": {"replace_cost": "1"}},
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", oc.OrthoCCPWarning)
        res = oc.estimate(
            panel, model, learner=CellFrequencyClassifier(alpha=1.0),
            regressor=CellFrequencyRegressor(), folds=3, seed=0, debias=False,
        )
    assert np.all(np.isfinite(res.params)) and np.all(res.std_errors > 0)
    assert res.learner == "CellFrequencyClassifier" and res.regressor == "CellFrequencyRegressor"
