"""An invented three-choice inventory scenario without a renewal or terminal choice.

Our own design (not from the literature), for tests and benchmarks of the discrete-state
estimators. A shop holds stock :math:`x \\in \\{0, \\dots, S-1\\}` and each period orders
nothing, a small lot (3 units) or a large lot (8 units); post-order stock is
:math:`y_j = \\min(x + q_j, S - 1)`, then demand :math:`d \\in \\{0, 1, 2, 3\\}` is served and
:math:`x' = \\max(y_j - d, 0)`. Flow utilities

.. math::

    u_{none} = -h\\, y/10 - k\\, 1\\{x = 0\\}, \\quad
    u_{small} = -c_s - h\\, y_{small}/10, \\quad u_{large} = -c_l - h\\, y_{large}/10,

(holding cost h on post-order stock, stock-out penalty k for not restocking an empty
shelf, fixed order costs). No choice resets the state to a distribution that does not
depend on it, and none ends the problem, so the finite-dependence estimator does not apply.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .._errors import InputError
from ..reference import BellmanSolution, solve_bellman

__all__ = ["INVENTORY", "InventoryDesign", "simulate_inventory"]

CHOICES = ("large", "none", "small")
"""Choice labels in sorted order (as :class:`~orthoccp.Panel` orders them)."""


@dataclass(frozen=True)
class InventoryDesign:
    """Constants of the inventory scenario.

    Parameters
    ----------
    n_states : int, default=25
    lots : tuple of int, default=(8, 0, 3)
        Order size of ``large``, ``none``, ``small`` (the order of :data:`CHOICES`).
    demand : tuple of float, default=(0.2, 0.35, 0.3, 0.15)
        pmf of demand 0..3.
    truth : dict
        ``holding`` h = 1.0, ``stockout`` k = 3.0, ``cost_small`` = 2.0, ``cost_large`` = 3.5.
    discount : float, default=0.95
    """

    n_states: int = 25
    lots: tuple[int, ...] = (8, 0, 3)
    demand: tuple[float, ...] = (0.2, 0.35, 0.3, 0.15)
    truth: dict[str, float] = field(default_factory=lambda: {
        "holding": 1.0, "stockout": 3.0, "cost_small": 2.0, "cost_large": 3.5})
    discount: float = 0.95

    def post_order(self) -> np.ndarray:
        """(S, J) post-order stock :math:`y_j(x)`."""
        x = np.arange(self.n_states)
        return np.minimum(x[:, None] + np.asarray(self.lots)[None, :], self.n_states - 1)

    def bases(self) -> dict[str, np.ndarray]:
        """Per choice, the post-order stock: the base of ``transitions="increments"``."""
        y = self.post_order()
        return {c: y[:, j] for j, c in enumerate(CHOICES)}

    def utility_spec(self) -> dict[str, dict[str, np.ndarray]]:
        """Per-state regressors for :func:`~orthoccp.discrete.estimate_discrete`."""
        y = self.post_order() / 10.0
        S = self.n_states
        empty = (np.arange(S) == 0).astype(np.float64)
        return {
            "large": {"holding": -y[:, 0], "cost_large": -np.ones(S)},
            "none": {"holding": -y[:, 1], "stockout": -empty},
            "small": {"holding": -y[:, 2], "cost_small": -np.ones(S)},
        }

    def design(self) -> tuple[np.ndarray, tuple[str, ...]]:
        """(S, J, p) design and parameter names (order of :attr:`truth`)."""
        names = tuple(self.truth)
        Z = np.zeros((self.n_states, len(CHOICES), len(names)))
        for j, c in enumerate(CHOICES):
            for name, reg in self.utility_spec()[c].items():
                Z[:, j, names.index(name)] = reg
        return Z, names

    def transitions(self) -> np.ndarray:
        """(J, S, S) transition matrices."""
        S = self.n_states
        F = np.zeros((len(CHOICES), S, S))
        y = self.post_order()
        for j in range(len(CHOICES)):
            for d, pd_ in enumerate(self.demand):
                np.add.at(F[j], (np.arange(S), np.maximum(y[:, j] - d, 0)), pd_)
        return F

    def solve(self) -> BellmanSolution:
        """Exact solution at the true parameters (sup-norm 1e-12)."""
        Z, names = self.design()
        theta = np.array([self.truth[k] for k in names])
        return solve_bellman(Z @ theta, self.transitions(), self.discount, tol=1e-12)


INVENTORY = InventoryDesign()
"""The default inventory scenario."""


def simulate_inventory(
    *, units: int, periods: int, seed: int, design: InventoryDesign = INVENTORY
) -> pd.DataFrame:
    """Simulate shops from the exactly solved inventory scenario.

    Parameters
    ----------
    units, periods : int
        Shops and periods per shop.
    seed : int
        Seeds the one generator that draws everything.
    design : InventoryDesign, default=INVENTORY

    Returns
    -------
    pandas.DataFrame
        Columns ``shop``, ``period``, ``stock`` (state 0..S-1, the first period uniform),
        ``order`` (``"large"``, ``"none"``, ``"small"``).

    Examples
    --------
    >>> simulate_inventory(units=2, periods=3, seed=0).shape
    (6, 4)
    """
    for name, v in (("units", units), ("periods", periods)):
        if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < 1:
            raise InputError(f"{name} must be a positive integer, got {v!r}.")
    rng = np.random.default_rng(seed)
    sol = design.solve()
    cum_p = np.cumsum(sol.ccp, axis=1)[:, :-1]
    cum_d = np.cumsum(design.demand)[:-1]
    y = design.post_order()
    N, T = int(units), int(periods)
    x = rng.integers(0, design.n_states, size=N)
    states = np.empty((N, T), dtype=np.int64)
    acts = np.empty((N, T), dtype=np.int64)
    for t in range(T):
        states[:, t] = x
        a = (rng.random(N)[:, None] > cum_p[x]).sum(axis=1)
        acts[:, t] = a
        d = (rng.random(N)[:, None] > cum_d[None, :]).sum(axis=1)
        x = np.maximum(y[x, a] - d, 0)
    return pd.DataFrame({
        "shop": np.repeat(np.arange(N), T),
        "period": np.tile(np.arange(T), N),
        "stock": states.ravel(),
        "order": np.asarray(CHOICES, dtype=object)[acts.ravel()],
    })
