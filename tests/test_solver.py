"""Specification of :mod:`orthoccp.solver`: the plug-in solve and the three routes of the
orthogonal solve (damped Newton, the Powell hybrid root-finder, the one-step estimator).

References: the plug-in maximiser is checked against statsmodels' conditional logit score
(through ``tests/test_reference_logit.py``); here the orthogonal routes are checked against
their definitions: a root satisfies :math:`\\sum\\psi = 0`, and the one-step estimator is
:math:`\\hat\\theta_{plug} - G^{-1}\\sum\\psi(\\hat\\theta_{plug})` (Newey & McFadden 1994,
Handbook of Econometrics vol. 4, §3.4).
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache
from typing import Any

import numpy as np
import pytest

import orthoccp as oc
from orthoccp.estimate import account_rows
from orthoccp.moments import MomentSystem, build_moment_system
from orthoccp.simulate import simulate
from orthoccp.solver import ROUTES, solve_orthogonal, solve_plugin

from _support import panel_and_model, truth_nuisances


@lru_cache(maxsize=None)
def _system(scenario: str) -> MomentSystem:
    """The moment system at the exact nuisances of a small simulated panel (mechanics only)."""
    sim = simulate(scenario, units=400, periods=8, seed=11, n_covariates=5)
    panel, model, order = panel_and_model(sim)
    bound = model.bind(panel)
    rows, corrected, _ = account_rows(bound)
    return build_moment_system(bound, truth_nuisances(sim, panel, model, order), rows, corrected)


@dataclass(frozen=True, eq=False)
class Shifted:
    """A moment system whose corrected moment carries an extra constant ``shift`` per row.

    A shift beyond the range of the logit score leaves :math:`\\sum\\psi` with no root at all.
    """

    base: MomentSystem
    shift: np.ndarray

    def __getattr__(self, name: str) -> Any:
        return getattr(self.base, name)

    def moment(self, theta: np.ndarray, *, debias: bool) -> np.ndarray:
        return self.base.moment(theta, debias=debias) + (self.shift if debias else 0.0)


@pytest.mark.parametrize("scenario", ["ebike", "producers"])
def test_newton_route_solves_the_moment(scenario: str) -> None:
    system = _system(scenario)
    start, _ = solve_plugin(system)
    theta, info = solve_orthogonal(system, start)
    assert info.route == "newton" and info.converged and info.note == ""
    psi = system.moment(theta, debias=True).sum(axis=0)
    G = system.jacobian(theta)
    # The remaining Newton step is far below the tolerance scale (1e-9 relative).
    assert np.abs(np.linalg.solve(G, psi)).max() < 1e-7


def test_root_finder_takes_over_when_newton_stops_short() -> None:
    system = _system("ebike")
    start, _ = solve_plugin(system)
    full, _ = solve_orthogonal(system, start)
    theta, info = solve_orthogonal(system, start, max_iter=1)
    assert info.route == "root"
    assert "damped Newton failed" in info.note and "1 iterations" in info.note
    np.testing.assert_allclose(theta, full, rtol=0, atol=1e-7)


def test_one_step_when_the_moment_has_no_root() -> None:
    base = _system("ebike")
    start, _ = solve_plugin(base)
    # A constant larger than any logit score sum: sum(psi) cannot reach zero.
    shift = np.zeros((base.n_rows, base.n_params))
    shift[:, 0] = 2.0
    system = Shifted(base, shift)
    theta, info = solve_orthogonal(system, start)  # type: ignore[arg-type]
    assert info.route == "one_step" and not info.converged
    G = base.jacobian(start)
    expected = start - np.linalg.solve(G, system.moment(start, debias=True).sum(axis=0))
    np.testing.assert_allclose(theta, expected, rtol=1e-12, atol=1e-12)
    assert "no root found" in info.note and "one-step" in info.note


def test_fallback_off_raises_with_the_newton_message() -> None:
    base = _system("ebike")
    start, _ = solve_plugin(base)
    shift = np.zeros((base.n_rows, base.n_params))
    shift[:, 0] = 2.0
    with pytest.raises(oc.EstimationError, match="no damped step|no convergence"):
        solve_orthogonal(Shifted(base, shift), start, fallback=False)  # type: ignore[arg-type]


def test_singular_jacobian_at_the_start_is_an_error_not_a_fallback() -> None:
    base = _system("ebike")
    start, _ = solve_plugin(base)
    X = base.X.copy()
    X[:, :, 1] = X[:, :, 0]  # two identical constructed regressors
    singular = MomentSystem(**{**base.__dict__, "X": X})
    with pytest.raises(oc.EstimationError, match="singular or ill-conditioned"):
        solve_orthogonal(singular, start)


def test_routes_are_named() -> None:
    assert ROUTES == ("newton", "root", "one_step")


def test_estimate_records_the_route(small_ebike) -> None:  # type: ignore[no-untyped-def]
    panel, model, _ = panel_and_model(small_ebike)
    res = oc.estimate(panel, model, learner="logit", folds=3, seed=0, splits=2)
    assert res.solve_routes == ("newton", "newton") and res.solve_notes == ("", "")
    assert "solution: damped Newton on the debiased moment (all 2 splits)" in res.summary()
    assert res.to_dict()["details"]["solution"]["routes"] == ["newton", "newton"]
    naive = oc.estimate(panel, model, learner="logit", folds=3, seed=0, debias=False)
    assert naive.solve_routes == ("plug-in",)


def test_split_spread_is_reported_with_several_splits(small_ebike) -> None:  # type: ignore[no-untyped-def]
    panel, model, _ = panel_and_model(small_ebike)
    res = oc.estimate(panel, model, learner="logit", folds=3, seed=0, splits=3)
    expected = res.split_params.std(axis=0, ddof=1) / res.std_errors
    np.testing.assert_allclose(res.split_spread, expected)
    assert "fold splits: across 3 splits the estimates spread by wear_cost" in res.summary()
    one = oc.estimate(panel, model, learner="logit", folds=3, seed=0)
    assert one.split_spread is None and "fold splits:" not in one.summary()


def test_a_singular_jacobian_names_the_parameters_it_cannot_move() -> None:
    """The null direction of G (its last right singular vector) names the parameters."""
    from types import SimpleNamespace

    from orthoccp._errors import EstimationError
    from orthoccp.estimate import _name_the_unidentified

    G = np.array([[2.0, 0.0, 0.0], [0.0, 1.0, 1.0], [0.0, 1.0, 1.0]])  # b and c move together
    system = SimpleNamespace(jacobian=lambda theta: G)
    exc = EstimationError("orthogonal solve: the Jacobian is singular or ill-conditioned (x)")
    with pytest.raises(EstimationError, match=r"direction (b|c) \([+-]0\.71\), (b|c) \([+-]0\.71\)"):
        _name_the_unidentified(exc, system, np.zeros(3), ("a", "b", "c"))
    # other errors pass through untouched
    _name_the_unidentified(EstimationError("something else"), system, np.zeros(3), ("a", "b", "c"))
