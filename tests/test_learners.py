"""Specification of orthoccp.learners and fold handling: registry, cloning, checks."""

from __future__ import annotations

import numpy as np
import pytest
from _support import panel_and_model
from sklearn.dummy import DummyClassifier

import orthoccp as oc
from orthoccp.folds import unit_folds


class NoProba:
    def fit(self, X, y):  # type: ignore[no-untyped-def]
        return self

    def get_params(self, deep=True):  # type: ignore[no-untyped-def]
        return {}


class BadProba(DummyClassifier):
    def predict_proba(self, X):  # type: ignore[no-untyped-def]
        return super().predict_proba(X) * 1.5


def test_unknown_learner_lists_valid_names(small_ebike) -> None:  # type: ignore[no-untyped-def]
    panel, model, _ = panel_and_model(small_ebike)
    with pytest.raises(oc.InputError, match="learner must be one of 'lightgbm', 'logit', 'lasso_logit', 'random_forest'"):
        oc.estimate(panel, model, learner="xgb")


def test_learner_without_predict_proba(small_ebike) -> None:  # type: ignore[no-untyped-def]
    panel, model, _ = panel_and_model(small_ebike)
    with pytest.raises(oc.InputError, match="has no predict_proba"):
        oc.estimate(panel, model, learner=NoProba())


def test_probabilities_outside_unit_interval(small_ebike) -> None:  # type: ignore[no-untyped-def]
    panel, model, _ = panel_and_model(small_ebike)
    with pytest.raises(oc.InputError, match=r"outside \[0, 1\]"):
        oc.estimate(panel, model, learner=BadProba(strategy="prior"), regressor="logit", folds=3)


@pytest.mark.parametrize("name", ["lasso_logit", "random_forest", "lightgbm_smooth"])
def test_registry_learners_run(small_ebike, name: str) -> None:  # type: ignore[no-untyped-def]
    panel, model, _ = panel_and_model(small_ebike)
    res = oc.estimate(panel, model, learner=name, folds=3)
    assert res.learner == name and np.all(np.isfinite(res.std_errors))


def test_folds_partition_units_and_respect_counts() -> None:
    units = np.repeat(np.arange(23), 3)
    f = unit_folds(units, 5, np.random.default_rng(0))
    for u in range(23):
        assert len(set(f[units == u])) == 1
    counts = np.bincount(f[::3], minlength=5)
    assert counts.max() - counts.min() <= 1


def test_fewer_units_than_folds() -> None:
    with pytest.raises(oc.InputError, match="only 3 unit"):
        unit_folds(np.array([0, 1, 2]), 5, np.random.default_rng(0))


# --------------------------------------------------------------------------- scale of the states
def _estimates_with(sim, frame, keys, learner: str):  # type: ignore[no-untyped-def]
    """Debiased and plug-in estimates on ``frame`` with the fold split of ``keys``."""
    import warnings

    panel = oc.Panel(frame, unit=sim.unit, period=sim.period, choice=sim.choice,
                     states=[*sim.states, "revenue"])
    if keys is not None:  # the folds are hashed from the row values: hold the split fixed
        object.__setattr__(panel, "unit_keys", keys)
    model = oc.Model(anchor=sim.anchor, kind=sim.kind, discount=sim.discount, utility=sim.utility)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = oc.estimate(panel, model, learner=learner, folds=3, scheme="plain", seed=0)
    return panel, res


@pytest.mark.parametrize("learner", ["logit", "lasso_logit"])
def test_rescaling_a_state_leaves_the_linear_learners_unchanged(small_ebike, learner: str) -> None:
    """Issue 21, item 2: the linear learners standardise their features.

    An irrelevant state ("revenue") and the wear state are rescaled by 1e-6, 1e3 and 1e12,
    and the revenue is also written as an int64 near 5e18 (an affine map of the original);
    the estimates move by at most 1e-6 standard errors. Without the standardisation the
    least-squares continuation regressions of ``logit`` cut the small columns off (measured
    on this panel: the revenue times 1e3 moved the estimates by 0.07 s.e.).
    """
    sim = small_ebike
    rng = np.random.default_rng(0)
    codes = rng.integers(0, 1000, size=len(sim.data))
    frame = sim.data.assign(revenue=codes.astype(float))
    panel, base = _estimates_with(sim, frame, None, learner)
    variants = {f"{col} x {f:g}": frame.assign(**{col: frame[col] * f})
                for col in ("revenue", "wear") for f in (1e-6, 1e3, 1e12)}
    variants["revenue as int64 near 5e18"] = frame.assign(
        revenue=np.int64(5 * 10**18) + codes.astype(np.int64) * np.int64(10**15))
    assert variants["revenue as int64 near 5e18"]["revenue"].dtype == np.int64
    se = base.std_errors.to_numpy()
    for name, variant in variants.items():
        _, res = _estimates_with(sim, variant, panel.unit_keys, learner)
        for attr in ("params", "plugin_params"):
            moved = np.abs(getattr(res, attr).to_numpy() - getattr(base, attr).to_numpy()) / se
            assert moved.max() <= 1e-6, f"{name}: {attr} moved by {moved.max():.3g} s.e."
