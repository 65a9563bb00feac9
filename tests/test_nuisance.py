"""The one cross-fitting engine (``orthoccp.nuisance.fit_predict`` on a backend session).

Every first stage runs its fits through it: the built-in CCPs and continuation regressions,
user nuisances (``orthoccp.custom``) and the learner-based Riesz weights. These tests check
the engine directly and that two front doors give the same fits through it.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from sklearn.linear_model import LinearRegression, LogisticRegression

import orthoccp as oc
from orthoccp._random import stream
from orthoccp.backends import resolve_backend
from orthoccp.folds import unit_folds
from orthoccp.learners import resolve_learners
from orthoccp.nuisance import FoldFit, crossfit_nuisances, fit_predict
from orthoccp.simulate import simulate


def _data(n: int = 300, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    X = rng.standard_normal((n, 3))
    y = (X @ np.array([1.0, -0.5, 0.25]) + rng.logistic(size=n) > 0).astype(np.int64)
    return X, y


def test_a_task_fits_its_rows_and_predicts_its_rows() -> None:
    """The prediction equals scikit-learn's own fit on the same rows (reference: scikit-learn)."""
    X, y = _data()
    train, predict = np.arange(0, 200), np.arange(200, 300)
    task = FoldFit(LogisticRegression(), train, predict, y[train], None, np.float64, "test", 0, 2)
    got, fit_s, predict_s = fit_predict(X, task, None)
    want = LogisticRegression().fit(X[train], y[train]).predict_proba(X[predict])
    np.testing.assert_array_equal(got, want)
    assert fit_s >= 0 and predict_s >= 0


def test_blocks_are_predicted_by_separate_calls() -> None:
    """``blocks``: each block is one ``predict`` call (bit-identical to calling per block),
    and an empty block or an empty task gives an empty result instead of a learner error."""
    X, y = _data()
    train = np.arange(150)
    a, b = np.arange(150, 160), np.arange(160, 300)
    predict = np.concatenate([a, np.empty(0, dtype=a.dtype), b])
    task = FoldFit(LinearRegression(), train, predict, X[train, 0] * 2.0 + y[train], None,
                   np.float64, "test", 0, blocks=(a.size, 0, b.size))
    got, _, _ = fit_predict(X, task, None)
    est = LinearRegression().fit(X[train], X[train, 0] * 2.0 + y[train])
    np.testing.assert_array_equal(got, np.concatenate([est.predict(X[a]), est.predict(X[b])]))
    empty = FoldFit(LogisticRegression(), train, np.empty(0, dtype=np.int64), y[train], None,
                    np.float64, "test", 0, 2)
    out, _, _ = fit_predict(X, empty, None)
    assert out.shape == (0, 2)


def test_a_bad_prediction_names_the_fit() -> None:
    class Broken(LinearRegression):
        def predict(self, X):  # type: ignore[no-untyped-def]
            return np.full(len(X), np.nan)

    X, y = _data()
    task = FoldFit(Broken(), np.arange(100), np.arange(100, 120), X[:100, 0], None, np.float64,
                   "nuisance 'g' in fold 3", 3)
    with pytest.raises(oc.InputError, match="nuisance 'g' in fold 3"):
        fit_predict(X, task, None)


def test_user_nuisance_and_built_in_first_stage_share_the_engine() -> None:
    """A user nuisance P(swap | states) with the registry logit is fitted exactly like the
    built-in CCP: same folds, same training rows in canonical order, same dtype, so the
    out-of-fold probabilities agree to rounding (1e-12 relative) on every row."""
    from _support import panel_and_model

    sim = simulate("ebike", units=200, periods=6, seed=2)
    panel, model, _ = panel_and_model(sim)
    folds = unit_folds(panel.unit_codes, 3, stream(0, "folds"), unit_keys=panel.unit_keys)
    ref = crossfit_nuisances(model.bind(panel), resolve_learners("logit"), folds,
                             stream(0, "first_stage"), scheme="plain")
    R = panel.choices.index("swap")
    ccp = oc.Nuisance(name="p_swap", target=lambda r, nu: (r["action"] == "swap").astype(float),
                      features=list(sim.states), learner="logit", binary=True)
    res = oc.estimate_moments(panel, lambda th, r, nu: nu["p_swap"] - th[0], [ccp],
                              parameters=["mean"], folds=3, seed=0, debias=False, clip=1e-4)
    assert res.fit is not None
    np.testing.assert_allclose(res.fit.values()["p_swap"], ref.ccp[:, R], rtol=1e-12)


def test_user_nuisances_give_the_same_numbers_on_every_backend() -> None:
    """Sequential and two joblib workers: the fits and their seeds do not depend on the
    backend (each learner is seeded before any fit runs)."""
    rng = np.random.default_rng(3)
    n = 400
    df = pd.DataFrame({"id": np.arange(n), "t": 0, "x": rng.standard_normal(n),
                       "d": rng.integers(0, 2, n)})
    df["y"] = df["x"] + df["d"] + rng.standard_normal(n)
    panel = oc.Panel(df, unit="id", period="t", choice="d", states=["x"])
    g = oc.Nuisance(name="g", target="y", features=["x"], by="d", learner="random_forest",
                    at={"g1": {"d": 1}, "g0": {"d": 0}})
    from orthoccp.custom._crossfit import crossfit
    from orthoccp.custom._spec import Rows, bind_nuisance

    rows = Rows(panel)
    design = bind_nuisance(g, panel, rows)
    folds = unit_folds(panel.unit_codes, 3, np.random.default_rng(1), unit_keys=panel.unit_keys)
    runs = [crossfit([design], rows, folds, panel.canonical_order, np.random.default_rng(7),
                     clip=1e-4, backend=resolve_backend(b, j))
            for b, j in (("sequential", None), ("joblib", 2))]
    for label in ("g", "g1", "g0"):
        np.testing.assert_array_equal(runs[0][0].values[label], runs[1][0].values[label])
