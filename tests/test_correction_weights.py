"""Specification of ``estimate(correction_weights="plugin")``: corrections fixed at the plug-in.

With the corrections' weights fixed at the plug-in solution θ̃, the estimate solves
Σ m(θ) + Σ φ(θ̃) = 0. The reference is scipy's Powell hybrid root-finder
(``scipy.optimize.root``) on that equation, built from the estimate's own moment pieces, and the
covariance is the clustered sandwich G⁻¹(Σ s_g s_g')G⁻¹' with s_g the unit sums of
m(θ̂) + φ(θ̃), times n/(n − 1) (Cameron & Miller 2015, J. Human Resources 50, eq. 11, from
memory).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import optimize

import orthoccp as oc

from _support import panel_and_model


@pytest.fixture(scope="module")
def fits(small_ebike):  # type: ignore[no-untyped-def]
    panel, model, _ = panel_and_model(small_ebike)
    common = dict(learner="logit", folds=3, seed=0)
    with pytest.warns(oc.OrthoCCPWarning):
        solution = oc.estimate(panel, model, **common)
        plugin = oc.estimate(panel, model, correction_weights="plugin", **common)
    return solution, plugin


def test_fixed_weights_solve_the_moment_with_constant_corrections(fits) -> None:  # type: ignore[no-untyped-def]
    solution, plugin = fits
    pieces = plugin.moment_pieces(1)
    system = pieces.system
    tilde = plugin.plugin_params.to_numpy()
    np.testing.assert_allclose(tilde, solution.plugin_params.to_numpy(), rtol=1e-12)
    phi_mu, phi_p = system.corrections(tilde)
    c = (phi_mu + phi_p).sum(axis=0)
    # the corrections do not move with theta
    far = tilde + 0.5
    np.testing.assert_allclose(np.add(*system.corrections(far)).sum(axis=0), c, rtol=1e-12)
    ref = optimize.root(lambda t: system.score(t).sum(axis=0) + c, tilde, method="hybr",
                        options={"xtol": 1e-13})
    assert ref.success
    np.testing.assert_allclose(plugin.params.to_numpy(), ref.x, rtol=1e-7, atol=1e-9)
    # the clustered sandwich of m(theta_hat) + phi(theta_tilde)
    theta = plugin.params.to_numpy()
    rows = system.score(theta) + phi_mu + phi_p
    units = np.unique(system.units, return_inverse=True)[1]
    s = np.zeros((units.max() + 1, rows.shape[1]))
    np.add.at(s, units, rows)
    Ginv = np.linalg.inv(system.jacobian(theta))
    n = s.shape[0]
    V = Ginv @ (s.T @ s) @ Ginv.T * n / (n - 1)
    np.testing.assert_allclose(plugin.std_errors.to_numpy(), np.sqrt(np.diag(V)), rtol=1e-8)


def test_the_choice_is_recorded_and_survives_the_json(fits) -> None:  # type: ignore[no-untyped-def]
    solution, plugin = fits
    assert solution.correction_weights == "solution" and plugin.correction_weights == "plugin"
    assert "weights fixed at the plug-in solution" in plugin.summary()
    assert "weights fixed" not in solution.summary()
    again = oc.Results.from_json(plugin.to_json())
    assert again.correction_weights == "plugin"


def test_a_bad_value_is_named(small_ebike) -> None:  # type: ignore[no-untyped-def]
    panel, model, _ = panel_and_model(small_ebike)
    with pytest.raises(oc.InputError, match="correction_weights.*'plug-in'"):
        oc.estimate(panel, model, learner="logit", folds=3, correction_weights="plug-in")
