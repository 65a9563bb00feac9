"""Specification of orthoccp.sensitivity: the estimate over a grid of discount factors.

The reference for every grid point is a fresh :func:`orthoccp.estimate` at that discount
factor with the same seed: reusing the first stage must not change a single number (1e-8),
whatever the moments, the number of splits or the model-implied steps draw from the seed.
"""

from __future__ import annotations

import dataclasses
import importlib
import warnings

import numpy as np
import pytest
from _support import panel_and_model

import orthoccp as oc
from orthoccp import nuisance
from orthoccp.sensitivity import discount_sensitivity

GRID = [0.9, 0.95]


def _bagged_lgbm() -> dict[str, object]:
    # Row and column subsampling make every fit depend on its seed, so a shifted seed stream
    # would show in the numbers.
    from lightgbm import LGBMClassifier, LGBMRegressor

    opts = dict(n_estimators=25, num_leaves=7, min_child_samples=40, subsample=0.7,
                subsample_freq=1, colsample_bytree=0.7, n_jobs=1, verbose=-1)
    return dict(learner=LGBMClassifier(**opts), regressor=LGBMRegressor(**opts))


def _quiet(fn, *args, **kw):  # type: ignore[no-untyped-def]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return fn(*args, **kw)


@pytest.fixture(scope="module")
def setup(small_ebike):  # type: ignore[no-untyped-def]
    panel, model, _ = panel_and_model(small_ebike)
    robust = dataclasses.replace(model, persistent=tuple(small_ebike.persistent))
    return panel, model, robust


def _same_as_fresh(panel, model, options, monkeypatch) -> oc.Results:  # type: ignore[no-untyped-def]
    calls = {"n": 0}
    real = nuisance.crossfit_nuisances

    def counting(*args, **kw):  # type: ignore[no-untyped-def]
        calls["n"] += 1
        return real(*args, **kw)

    est_module = importlib.import_module("orthoccp.estimate")  # the module, not the function
    monkeypatch.setattr(est_module, "crossfit_nuisances", counting)
    sens = _quiet(discount_sensitivity, panel, model, discounts=GRID, **options)
    splits = options.get("splits", 1)
    assert calls["n"] == splits  # the first stage of each split is fitted once for the grid
    monkeypatch.setattr(est_module, "crossfit_nuisances", real)
    for beta in GRID:
        fresh = _quiet(oc.estimate, panel, dataclasses.replace(model, discount=beta), **options)
        got = sens.results[beta]
        assert got.model["discount"] == beta
        np.testing.assert_allclose(got.params, fresh.params, rtol=0, atol=1e-8)
        np.testing.assert_allclose(got.std_errors, fresh.std_errors, rtol=0, atol=1e-8)
        np.testing.assert_allclose(got.plugin_params, fresh.plugin_params, rtol=0, atol=1e-8)
        assert got.moments == fresh.moments
    # beta moves the estimates: the grid points are not one estimate repeated.
    assert not np.allclose(sens.results[GRID[0]].params, sens.results[GRID[1]].params)
    return sens


def test_grid_equals_fresh_estimates_default_moments(setup, monkeypatch) -> None:  # type: ignore[no-untyped-def]
    panel, model, _ = setup
    sens = _same_as_fresh(panel, model, dict(**_bagged_lgbm(), folds=3, seed=4, splits=2),
                          monkeypatch)
    assert sens.results[GRID[0]].moments == "standard"


def test_grid_equals_fresh_estimates_renewal_robust(setup, monkeypatch) -> None:  # type: ignore[no-untyped-def]
    panel, _, robust = setup
    sens = _same_as_fresh(panel, robust, dict(**_bagged_lgbm(), folds=3, seed=2, splits=2),
                          monkeypatch)
    assert sens.results[GRID[0]].moments == "renewal_robust"
    assert sens.other_fits > 0  # the projections were refitted at every beta


def test_grid_equals_fresh_estimates_model_ccp_steps(setup, monkeypatch) -> None:  # type: ignore[no-untyped-def]
    panel, model, _ = setup
    _same_as_fresh(panel, model, dict(**_bagged_lgbm(), folds=3, seed=1,
                                      model_ccp_steps=1), monkeypatch)


def test_table_summary_and_figure(setup, tmp_path) -> None:  # type: ignore[no-untyped-def]
    panel, model, _ = setup
    sens = _quiet(discount_sensitivity, panel, model, discounts=[0.95, 0.9], learner="logit",
                  folds=3)
    t = sens.to_frame()
    assert list(t.columns) == ["discount", "parameter", "estimate", "std_error", "lower",
                               "upper", "plugin"]
    assert sens.discounts == [0.9, 0.95]  # sorted
    assert len(t) == 2 * len(model.parameters)
    # the interval is the results' own 95 % interval (estimate -/+ 1.96 s.e.)
    z = 1.959963984540054  # scipy.stats.norm.ppf(0.975)
    np.testing.assert_allclose(t["upper"] - t["estimate"], z * t["std_error"], rtol=1e-9)
    assert "assumed: 0.95" in sens.summary() and " *" in sens.summary()
    fig = sens.plot(path=tmp_path / "beta.png")
    assert (tmp_path / "beta.png").stat().st_size > 1000
    assert len([ax for ax in fig.axes if ax.get_visible()]) == len(model.parameters)


@pytest.mark.parametrize(
    "discounts, match",
    [
        ([0.9], "at least two"),
        ([0.9, 1.0], r"in \[0, 1\)"),
        ([0.9, "a"], "numbers"),
        ([0.9, 0.9], "twice"),
        ("0.9", "list of discount factors"),
    ],
)
def test_bad_grid(setup, discounts, match) -> None:  # type: ignore[no-untyped-def]
    panel, model, _ = setup
    with pytest.raises(oc.InputError, match=match):
        discount_sensitivity(panel, model, discounts=discounts)


def test_discount_option_refused(setup) -> None:  # type: ignore[no-untyped-def]
    panel, model, _ = setup
    with pytest.raises(oc.InputError, match="drop the discount option"):
        discount_sensitivity(panel, model, discounts=GRID, discount=0.9)
