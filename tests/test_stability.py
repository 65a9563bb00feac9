"""Specification of orthoccp.stability: one fold's first stage refit with another seed.

The checks are identities of the procedure, not estimator accuracy: the reference reproduces
:func:`orthoccp.estimate` exactly; a learner without randomness (logistic regression by
L-BFGS, a deterministic optimiser) gives changes of exactly zero; a randomised learner gives
non-zero changes whose reported ratio is the change over the reference's standard error.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from _support import panel_and_model

import orthoccp as oc
from orthoccp.stability import NOTABLE_CHANGE_SE, fold_stability


def _tiny_bagged_lgbm() -> tuple[object, object]:
    # Row and column subsampling make the fits depend on the seed.
    from lightgbm import LGBMClassifier, LGBMRegressor

    opts = dict(n_estimators=30, num_leaves=7, min_child_samples=40, subsample=0.7,
                subsample_freq=1, colsample_bytree=0.7, n_jobs=1, verbose=-1)
    return LGBMClassifier(**opts), LGBMRegressor(**opts)


@pytest.fixture(scope="module")
def setup(small_ebike):  # type: ignore[no-untyped-def]
    panel, model, _ = panel_and_model(small_ebike)
    return panel, model


def _quiet(fn, *args, **kw):  # type: ignore[no-untyped-def]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return fn(*args, **kw)


def test_a_deterministic_learner_is_perfectly_stable(setup) -> None:  # type: ignore[no-untyped-def]
    panel, model = setup
    fs = _quiet(fold_stability, panel, model, learner="logit", folds=3)
    ref = _quiet(oc.estimate, panel, model, learner="logit", folds=3)
    # The reference is the ordinary estimate, to the last digit.
    np.testing.assert_array_equal(fs.reference.params.to_numpy(), ref.params.to_numpy())
    np.testing.assert_array_equal(fs.reference.std_errors.to_numpy(), ref.std_errors.to_numpy())
    assert fs.table.shape == (3 * len(ref.params), 3)
    assert (fs.table["change"] == 0).all() and (fs.table["change_se"] == 0).all()
    assert "moves no estimate by more than 0.00 standard errors" in fs.reading()


def test_a_randomised_learner_moves_and_is_reported_in_standard_errors(setup) -> None:  # type: ignore[no-untyped-def]
    panel, model = setup
    clf, reg = _tiny_bagged_lgbm()
    fs = _quiet(fold_stability, panel, model, learner=clf, regressor=reg, folds=3, moments="standard")
    t = fs.table
    assert (t["change"] != 0).any()
    se = fs.reference.std_errors
    for (fold, name), row in t.iterrows():
        assert row["change"] == pytest.approx(row["estimate"] - fs.reference.params[name], abs=1e-12)
        assert row["change_se"] == pytest.approx(row["change"] / se[name], rel=1e-12)
    worst = fs.max_change_se()
    assert list(worst.index) == list(fs.reference.params.index)
    expected = "moves no estimate" if worst.max() <= NOTABLE_CHANGE_SE else "use repeated cross-fitting"
    assert expected in fs.reading()
    # Same seed, same numbers.
    again = _quiet(fold_stability, panel, model, learner=clf, regressor=reg, folds=3, moments="standard")
    np.testing.assert_array_equal(again.table.to_numpy(), t.to_numpy())


def test_renewal_robust_moments_are_supported(setup) -> None:  # type: ignore[no-untyped-def]
    panel, _ = setup
    sim_model = setup[1]
    model = oc.Model(anchor=sim_model.anchor, kind=sim_model.kind, discount=sim_model.discount,
                     utility=sim_model.utility, persistent=["x0"])
    fs = _quiet(fold_stability, panel, model, learner="logit", folds=3)
    assert fs.reference.moments == "renewal_robust"
    assert np.isfinite(fs.table.to_numpy()).all()


@pytest.mark.parametrize(
    "options, match",
    [
        ({"debias": False}, r"checks the debiased estimate"),
        ({"splits": 2}, r"refits the first stage itself; drop splits="),
        ({"folds": 1}, r"folds must be an integer >= 2"),
        ({"scheme": "twice"}, r"scheme must be one of 'plain', 'nested', got 'twice'"),
    ],
)
def test_bad_options(setup, options, match) -> None:  # type: ignore[no-untyped-def]
    panel, model = setup
    with pytest.raises(oc.InputError, match=match):
        fold_stability(panel, model, learner="logit", **options)


def test_static_models_have_no_first_stage(setup) -> None:  # type: ignore[no-untyped-def]
    panel, model = setup
    static = oc.Model(anchor=model.anchor, kind=model.kind, discount=0.0, utility=model.utility)
    with pytest.raises(oc.InputError, match="with discount 0 there is none"):
        fold_stability(panel, static, learner="logit")
