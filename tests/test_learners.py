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
    with pytest.raises(oc.InputError, match="valid names: lightgbm, logit, lasso_logit, random_forest"):
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
