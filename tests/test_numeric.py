"""Specification of orthoccp._numeric: the one central-difference Jacobian of the solvers.

Outside reference: the analytic derivative of the logistic function, d expit(x)/dx =
expit(x)(1 - expit(x)) (scipy.special.expit); the step rule is checked as mechanics.
"""

from __future__ import annotations

import numpy as np
from scipy.special import expit

from orthoccp._numeric import RELATIVE_STEP, central_jacobian


def test_matches_the_analytic_jacobian_of_a_logit() -> None:
    X = np.array([[1.0, 0.5, -2.0], [1.0, -1.0, 0.3], [1.0, 2.0, 1.5], [1.0, 0.0, -0.7]])
    theta = np.array([0.3, -1.2, 0.8])
    p = expit(X @ theta)
    exact = (p * (1 - p))[:, None] * X
    J = central_jacobian(lambda t: expit(X @ t), theta)
    assert J.shape == (4, 3)
    np.testing.assert_allclose(J, exact, rtol=0, atol=1e-9)


def test_step_is_relative_to_the_parameter() -> None:
    # The solvers' step rule, h_j = 1e-6 (1 + |theta_j|), one pair of points per parameter.
    theta = np.array([0.0, 3.0, -40.0])
    calls: list[np.ndarray] = []

    def f(t: np.ndarray) -> np.ndarray:
        calls.append(t.copy())
        return t**3

    J = central_jacobian(f, theta)
    h = RELATIVE_STEP * (1.0 + np.abs(theta))
    assert RELATIVE_STEP == 1e-6 and len(calls) == 6
    for j in range(3):
        np.testing.assert_allclose(calls[2 * j] - theta, h[j] * np.eye(3)[j], rtol=0, atol=1e-13)
        np.testing.assert_allclose(calls[2 * j + 1] - theta, -h[j] * np.eye(3)[j], rtol=0, atol=1e-13)
    np.testing.assert_allclose(np.diag(J), 3 * theta**2, rtol=1e-8, atol=1e-8)
    assert np.count_nonzero(J - np.diag(np.diag(J))) == 0
