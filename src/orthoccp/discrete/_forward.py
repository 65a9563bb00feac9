"""Forward simulation of continuation values (Hotz, Miller, Sanders & Smith 1994).

For a state s and a choice j, the continuation value :math:`(F_j W)(s)` of following the
estimated CCPs :math:`\\hat P` afterwards is the expectation over paths
:math:`x_1 \\sim \\hat F_j(\\cdot \\mid s)`, :math:`a_t \\sim \\hat P(\\cdot \\mid x_t)`,
:math:`x_{t+1} \\sim \\hat F_{a_t}(\\cdot \\mid x_t)` of

.. math::

    \\sum_{t=1}^{T} \\beta^{t-1} \\big[ Z_{a_t}(x_t)'\\theta + \\gamma_E - \\ln \\hat P_{a_t}(x_t) \\big],

which is linear in :math:`\\theta`. The paths are simulated once per set of CCPs and the
discounted sums of :math:`Z` and of the entropy term are kept apart, so every trial
:math:`\\theta` reuses the same draws (common random numbers across :math:`\\theta`). The
draws come from a generator seeded afresh on every call, so successive NPL iterations reuse
the same uniforms too.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy import sparse

from .._errors import InputError
from ..model import EULER_GAMMA

__all__ = ["SimulatedValues", "default_horizon", "simulate_continuation"]


@dataclass(frozen=True, eq=False)
class SimulatedValues:
    """Simulated continuation terms at the observed states.

    Attributes
    ----------
    Zt, et : numpy.ndarray
        (S, J, p) and (S, J): :math:`\\tilde Z_j = Z_j + \\beta\\,\\overline{\\sum\\beta^{t-1}Z}`
        and :math:`\\tilde e_j = \\beta\\,\\overline{\\sum\\beta^{t-1}(\\gamma_E - \\ln\\hat P)}`
        (zero rows at unobserved states).
    mean_cov : numpy.ndarray
        (S, J, p+1, p+1) simulation covariance of the path-average of
        :math:`(\\sum\\beta^{t-1}Z, \\sum\\beta^{t-1}(\\gamma_E - \\ln \\hat P))`, i.e. the path
        covariance divided by ``n_paths``.
    n_paths, horizon : int
    """

    Zt: np.ndarray
    et: np.ndarray
    mean_cov: np.ndarray
    n_paths: int
    horizon: int


def default_horizon(discount: float, tol: float = 1e-6) -> int:
    """Smallest T with :math:`\\beta^T \\le` ``tol`` (1 when :math:`\\beta = 0`)."""
    if discount <= 0.0:
        return 1
    return max(1, int(math.ceil(math.log(tol) / math.log(discount))))


class _RowSampler:
    """Draws :math:`x' \\sim F(\\cdot \\mid x)` for many x at once from a CSR matrix."""

    def __init__(self, matrix: sparse.csr_matrix) -> None:
        m = sparse.csr_matrix(matrix)
        m.sort_indices()
        self.indptr, self.indices = m.indptr, m.indices
        S = m.shape[0]
        row = np.repeat(np.arange(S), np.diff(m.indptr))
        within = np.cumsum(m.data) - np.repeat(
            np.concatenate([[0.0], np.cumsum(m.data)])[m.indptr[:-1]], np.diff(m.indptr)
        )
        self.cum = row + within
        last = m.indptr[1:] - 1
        self.cum[last[np.diff(m.indptr) > 0]] = np.arange(S)[np.diff(m.indptr) > 0] + 1.0

    def draw(self, x: np.ndarray, u: np.ndarray) -> np.ndarray:
        pos = np.searchsorted(self.cum, x + u, side="right")
        pos = np.clip(pos, self.indptr[x], self.indptr[x + 1] - 1)
        return np.asarray(self.indices[pos])


def simulate_continuation(
    ccp: np.ndarray,
    design: np.ndarray,
    mats: Sequence[sparse.csr_matrix],
    discount: float,
    states: np.ndarray,
    *,
    n_paths: int,
    horizon: int,
    seed: int,
) -> SimulatedValues:
    """Simulate the continuation terms for every choice at ``states``.

    Parameters
    ----------
    ccp : numpy.ndarray
        (S, J) CCPs the paths follow (strictly positive where they can be drawn).
    design : numpy.ndarray
        (S, J, p) flow-utility design.
    mats : sequence of scipy.sparse.csr_matrix
        J transition matrices.
    discount : float
        :math:`\\beta`.
    states : numpy.ndarray
        State codes at which to simulate (typically the observed ones).
    n_paths : int
        Paths per state and choice.
    horizon : int
        Periods simulated after the current one (truncation T).
    seed : int
        Seed of the generator (the same seed gives the same uniforms).

    Returns
    -------
    SimulatedValues
    """
    if isinstance(n_paths, bool) or not isinstance(n_paths, (int, np.integer)) or n_paths < 2:
        raise InputError(f"n_paths must be an integer >= 2, got {n_paths!r}.")
    S, J, p = design.shape
    M, T = int(n_paths), int(horizon)
    rng = np.random.default_rng(seed)
    samplers = [_RowSampler(m) for m in mats]
    cum_p = np.cumsum(ccp, axis=1)[:, :-1]
    ent = EULER_GAMMA - np.log(np.clip(ccp, 1e-300, None))
    C = states.size * J
    cell_state = np.repeat(states, J)
    cell_choice = np.tile(np.arange(J), states.size)
    start = np.repeat(cell_state, M)
    first = np.repeat(cell_choice, M)
    x = np.empty(C * M, dtype=np.int64)
    u = rng.random(C * M)
    for j in range(J):
        sel = first == j
        x[sel] = samplers[j].draw(start[sel], u[sel])
    acc = np.zeros((C * M, p + 1))
    weight = 1.0
    for _ in range(T):
        draws = rng.random((2, C * M))
        a = (draws[0][:, None] > cum_p[x]).sum(axis=1)
        acc[:, :p] += weight * design[x, a, :]
        acc[:, p] += weight * ent[x, a]
        nxt = np.empty_like(x)
        for j in range(J):
            sel = a == j
            nxt[sel] = samplers[j].draw(x[sel], draws[1][sel])
        x = nxt
        weight *= discount
    paths = acc.reshape(C, M, p + 1)
    mean = paths.mean(axis=1)
    dev = paths - mean[:, None, :]
    cov = np.einsum("cma,cmb->cab", dev, dev) / (M - 1) / M
    Zt = design.copy()
    et = np.zeros((S, J))
    mean_cov = np.zeros((S, J, p + 1, p + 1))
    Zt[cell_state, cell_choice] += discount * mean[:, :p]
    et[cell_state, cell_choice] = discount * mean[:, p]
    mean_cov[cell_state, cell_choice] = cov
    return SimulatedValues(Zt=Zt, et=et, mean_cov=mean_cov, n_paths=M, horizon=T)
