"""The bus-engine replacement design of Su & Judd (2012), based on Rust (1987).

Source: Su, C.-L. and Judd, K. L. (2012), "Constrained optimization approaches to estimation
of structural models", Econometrica 80(5), 2213--2230, Monte Carlo design (built on Rust 1987).
The constants below are as quoted in the project's issue (from the paper): 175 mileage
states, replacement cost RC = 11.7257, cost slope theta11 = 2.4569, mileage-increment pmf
theta3 = (0.0937, 0.4475, 0.4459, 0.0127, 0.0002) for increases of 0..4 states, linear cost
c(x) = 0.001 * theta11 * x and discount factor 0.975 (the paper also uses 0.995).

Model: in mileage state :math:`x \\in \\{0, \\dots, 174\\}` the manager keeps the engine
(:math:`u_{keep} = -c(x) + \\varepsilon_{keep}`) or replaces it
(:math:`u_{replace} = -RC + \\varepsilon_{replace}`); replacement resets mileage to 0, and then
the month's increment applies: :math:`x' = \\min(b + k, 174)` with :math:`b = x` after keeping,
:math:`b = 0` after replacing, :math:`\\Pr(k) = \\theta_{3k}`.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Literal

import numpy as np
import pandas as pd

from .._errors import InputError
from ._bellman import BellmanSolution, solve_bellman

__all__ = ["BusDesign", "SU_JUDD_BUS", "bus_transitions", "simulate_bus", "solve_bus"]

BUS_CHOICES: tuple[str, str] = ("keep", "replace")
"""Choice labels in the order of the columns of every bus array."""


def bus_transitions(increments: np.ndarray, n_states: int, *, reset_state: int = 0) -> np.ndarray:
    """Transition matrices of the mileage state under keep and replace.

    Parameters
    ----------
    increments : numpy.ndarray
        (K+1,) pmf of the mileage increase :math:`k = 0, \\dots, K`.
    n_states : int
        Number of mileage states S; increases past the last state stop there.
    reset_state : int, default=0
        State a replacement resets mileage to before the month's increase.

    Returns
    -------
    numpy.ndarray
        (2, S, S): ``[0]`` keep, :math:`F(x' \\mid x) = \\sum_k \\theta_{3k}\\,
        1\\{x' = \\min(x + k, S-1)\\}`; ``[1]`` replace, the same from ``reset_state`` in every row.
    """
    pmf = np.asarray(increments, dtype=np.float64)
    if pmf.ndim != 1 or pmf.size == 0 or pmf.min() < 0 or abs(pmf.sum() - 1.0) > 1e-9:
        raise InputError(f"increments must be a pmf (non-negative, summing to 1), got {pmf!r}.")
    S = int(n_states)
    if not 0 <= reset_state < S:
        raise InputError(f"reset_state must be in 0..{S - 1}, got {reset_state!r}.")
    keep = np.zeros((S, S))
    rows = np.arange(S)
    for k, pk in enumerate(pmf):
        np.add.at(keep, (rows, np.minimum(rows + k, S - 1)), pk)
    replace = np.repeat(keep[reset_state][None, :], S, axis=0)
    return np.stack([keep, replace])


@dataclass(frozen=True)
class BusDesign:
    """Constants of the bus-engine design (defaults: Su & Judd 2012, from Rust 1987).

    Parameters
    ----------
    n_states : int, default=175
        Mileage states 0..S-1.
    replace_cost : float, default=11.7257
        RC.
    cost_slope : float, default=2.4569
        :math:`\\theta_{11}` in :math:`c(x) = 0.001\\,\\theta_{11} x`.
    increments : tuple of float, default=(0.0937, 0.4475, 0.4459, 0.0127, 0.0002)
        :math:`\\theta_3`: pmf of the monthly mileage increase by 0..4 states.
    discount : float, default=0.975
        :math:`\\beta`.
    cost_scale : float, default=0.001
        The 0.001 in :math:`c(x)`.

    Notes
    -----
    Flow utilities :math:`u_{keep}(x) = -0.001\\,\\theta_{11} x`, :math:`u_{replace} = -RC`.
    In the parametrisation used by :func:`orthoccp.reference.nfxp_estimate` (see
    :meth:`utility_spec`) the parameters are ``RC`` and ``theta11`` with these signs; in
    orthoccp's ``Model(utility={"keep": {...: "neg_mileage_k"}, "replace": {...: "1"}})`` the
    constant's coefficient is :math:`-RC`.
    """

    n_states: int = 175
    replace_cost: float = 11.7257
    cost_slope: float = 2.4569
    increments: tuple[float, ...] = field(default=(0.0937, 0.4475, 0.4459, 0.0127, 0.0002))
    discount: float = 0.975
    cost_scale: float = 0.001

    @property
    def mileage(self) -> np.ndarray:
        """(S,) mileage state indices 0..S-1."""
        return np.arange(self.n_states, dtype=np.float64)

    @property
    def truth(self) -> dict[str, float]:
        """True parameters in the ``RC``/``theta11`` parametrisation."""
        return {"RC": self.replace_cost, "theta11": self.cost_slope}

    def utility_spec(self) -> dict[str, dict[str, np.ndarray]]:
        """Per-state regressors for :func:`~orthoccp.reference.nfxp_estimate`.

        ``{"keep": {"theta11": -0.001 x}, "replace": {"RC": -1}}``, so that
        :math:`u_{keep} = \\theta_{11}(-0.001 x)` and :math:`u_{replace} = RC \\cdot (-1)`.
        """
        S = self.n_states
        return {
            "keep": {"theta11": -self.cost_scale * self.mileage},
            "replace": {"RC": -np.ones(S)},
        }

    def flow_utility(self) -> np.ndarray:
        """(S, 2) flow utilities ``[keep, replace]`` at the design's parameters."""
        keep = -self.cost_scale * self.cost_slope * self.mileage
        replace = np.full(self.n_states, -self.replace_cost)
        return np.column_stack([keep, replace])

    def transitions(self) -> np.ndarray:
        """(2, S, S) keep/replace transition matrices (:func:`bus_transitions`)."""
        return bus_transitions(np.asarray(self.increments), self.n_states)


SU_JUDD_BUS = BusDesign()
"""The Su & Judd (2012) bus design with beta = 0.975 (constants as quoted in the project's issue)."""


def solve_bus(design: BusDesign = SU_JUDD_BUS, *, tol: float = 1e-12) -> BellmanSolution:
    """Exact solution (to sup-norm ``tol``) of the bus model at the design's parameters.

    Parameters
    ----------
    design : BusDesign, default=SU_JUDD_BUS
        Constants.
    tol : float, default=1e-12
        Bellman residual tolerance (:func:`~orthoccp.reference.solve_bellman`).

    Returns
    -------
    BellmanSolution
        Columns of ``ccp`` and ``choice_values`` in the order ``("keep", "replace")``.
    """
    return solve_bellman(design.flow_utility(), design.transitions(), design.discount, tol=tol)


def _stationary(solution: BellmanSolution, transitions: np.ndarray) -> np.ndarray:
    """Stationary distribution of mileage under the optimal policy: :math:`\\pi = \\pi F^P`."""
    FP = np.einsum("sj,jst->st", solution.ccp, transitions)
    S = FP.shape[0]
    A = np.vstack([FP.T - np.eye(S), np.ones((1, S))])
    b = np.zeros(S + 1)
    b[-1] = 1.0
    pi = np.linalg.lstsq(A, b, rcond=None)[0]
    pi = np.clip(pi, 0.0, None)
    return pi / pi.sum()


def simulate_bus(
    *,
    buses: int,
    periods: int,
    seed: int,
    design: BusDesign = SU_JUDD_BUS,
    initial: Literal["stationary", "zero"] = "stationary",
) -> pd.DataFrame:
    """Simulate a panel of buses from the exactly solved bus model.

    Parameters
    ----------
    buses : int
        Number of buses (units).
    periods : int
        Months per bus.
    seed : int
        Seed of the one :func:`numpy.random.default_rng` generator that draws everything.
    design : BusDesign, default=SU_JUDD_BUS
        Constants of the design.
    initial : {"stationary", "zero"}, default="stationary"
        First month's mileage: a draw from the stationary distribution of mileage under the
        optimal policy, or 0 (new engines).

    Returns
    -------
    pandas.DataFrame
        One row per bus and month, sorted by bus and month, with columns ``bus``, ``month``
        (0..periods-1), ``mileage`` (state index 0..S-1), ``action`` (``"keep"`` or
        ``"replace"``), ``neg_mileage_k`` (:math:`-0.001 x`, the keep regressor of
        :math:`\\theta_{11}`) and the exact CCPs ``p_keep`` and ``p_replace`` at the row's state.

    Notes
    -----
    Each month the action is drawn from the exact CCP at the current state, then the next
    state is :math:`\\min(b + k, S-1)` with :math:`b = x` (keep) or :math:`0` (replace) and
    :math:`k \\sim \\theta_3`. The CCPs solve the Bellman equation to sup-norm 1e-12
    (:func:`solve_bus`).

    Examples
    --------
    >>> df = simulate_bus(buses=3, periods=4, seed=0)
    >>> df.shape, list(df.columns[:4])
    ((12, 7), ['bus', 'month', 'mileage', 'action'])
    """
    for name, value in (("buses", buses), ("periods", periods)):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
            raise InputError(f"{name} must be a positive integer, got {value!r}.")
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise InputError(f"seed must be a non-negative integer, got {seed!r}.")
    if initial not in ("stationary", "zero"):
        raise InputError(f"initial must be 'stationary' or 'zero', got {initial!r}.")
    rng = np.random.default_rng(seed)
    sol = solve_bus(design)
    F = design.transitions()
    S = design.n_states
    pmf = np.asarray(design.increments, dtype=np.float64)
    cum_inc = np.cumsum(pmf)
    cum_inc[-1] = 1.0
    N, T = int(buses), int(periods)

    if initial == "stationary":
        cum_pi = np.cumsum(_stationary(sol, F))
        cum_pi[-1] = 1.0
        x = np.searchsorted(cum_pi, rng.random(N), side="right")
    else:
        x = np.zeros(N, dtype=np.int64)
    p_replace = sol.ccp[:, 1]
    states = np.empty((N, T), dtype=np.int64)
    acts = np.empty((N, T), dtype=np.int64)
    for t in range(T):
        states[:, t] = x
        a = (rng.random(N) < p_replace[x]).astype(np.int64)
        acts[:, t] = a
        k = np.searchsorted(cum_inc, rng.random(N), side="right")
        base = np.where(a == 1, 0, x)
        x = np.minimum(base + k, S - 1)

    mileage = states.reshape(-1)
    frame = pd.DataFrame(
        {
            "bus": np.repeat(np.arange(N), T),
            "month": np.tile(np.arange(T), N),
            "mileage": mileage,
            "action": np.asarray(BUS_CHOICES, dtype=object)[acts.reshape(-1)],
            "neg_mileage_k": -design.cost_scale * mileage.astype(np.float64),
            "p_keep": sol.ccp[mileage, 0],
            "p_replace": sol.ccp[mileage, 1],
        }
    )
    return frame
