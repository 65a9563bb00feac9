"""Numerical derivatives shared by the solvers.

One central-difference Jacobian for the second stages: the orthogonal solve of
:mod:`orthoccp.solver` (the Jacobian of :math:`\\sum_i\\psi_i`) and the GMM of user moments in
:mod:`orthoccp.custom` (the Jacobian of the mean moment, and of :math:`\\sum m` for the
sandwich) both call :func:`central_jacobian`.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

__all__ = ["central_jacobian"]

RELATIVE_STEP = 1e-6
"""Step of parameter k: ``RELATIVE_STEP * (1 + |theta_k|)``. For a smooth f the error of a
central difference is O(h^2) from truncation plus O(eps |f| / h) from rounding; a step near
eps^(1/3) ~ 6e-6, scaled to the parameter's size, balances the two."""


def central_jacobian(f: Callable[[np.ndarray], np.ndarray], theta: np.ndarray) -> np.ndarray:
    """Jacobian of a vector function by central differences (for a small parameter vector).

    Parameters
    ----------
    f : callable
        Maps a parameter vector of length p to a vector of length k.
    theta : numpy.ndarray
        Where to differentiate, shape (p,).

    Returns
    -------
    numpy.ndarray
        (k, p), column j equal to :math:`(f(\\theta + h_j e_j) - f(\\theta - h_j e_j)) / (2 h_j)`
        with :math:`h_j` = ``RELATIVE_STEP * (1 + |theta_j|)``.

    Examples
    --------
    >>> J = central_jacobian(lambda t: np.array([t[0] ** 2, t[0] * t[1]]), np.array([1.0, 2.0]))
    >>> np.round(J, 8)
    array([[2., 0.],
           [2., 1.]])
    """
    cols = []
    for j in range(theta.size):
        h = RELATIVE_STEP * (1.0 + abs(theta[j]))
        e = np.zeros(theta.size)
        e[j] = h
        cols.append((f(theta + e) - f(theta - e)) / (2 * h))
    return np.column_stack(cols)
