"""The entry-exit game of Aguirregabiria & Mira (2007, section 5): players, states, payoffs."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .._errors import InputError

__all__ = ["EntryGame", "am2007_game", "AM2007_EXPERIMENTS"]

AM2007_EXPERIMENTS: dict[int, tuple[float, float]] = {
    1: (1.0, 0.0),
    2: (1.0, 1.0),
    3: (1.0, 2.0),
    4: (0.0, 1.0),
    5: (2.0, 1.0),
    6: (4.0, 1.0),
}
"""Experiment -> (theta_EC, theta_RN) of Aguirregabiria & Mira (2007, Econometrica 75, section
5, Table I); every experiment has fixed costs -1.9, ..., -1.5, theta_RS = 1 and beta = 0.95."""


def _size_transition(levels: int) -> np.ndarray:
    """The design's market-size chain: stay with 0.6 (0.8 at either end), move one level with
    0.2 each way."""
    F = np.zeros((levels, levels))
    for s in range(levels):
        F[s, s] = 0.6
        F[s, max(s - 1, 0)] += 0.2
        F[s, min(s + 1, levels - 1)] += 0.2
    return F


@dataclass(frozen=True, eq=False)
class EntryGame:
    r"""A dynamic entry-exit game between ``n_firms`` potential entrants in a market.

    Each period every firm chooses to be active (1) or not (0). Firm i's payoff of being
    active is

    .. math::

        \theta_{FC,i} + \theta_{RS} s_t - \theta_{EC}(1 - a_{i,t-1})
        - \theta_{RN} \ln(1 + N_{-i,t}) + \varepsilon_{it}(1),

    and of being inactive :math:`\varepsilon_{it}(0)`, with i.i.d. type-I extreme-value private
    shocks; :math:`N_{-i,t}` counts the rivals active this period and :math:`s_t` is the market
    size (levels 1, ..., ``size_levels``), an exogenous Markov chain. The payoff-relevant state
    is :math:`x_t = (s_t, a_{t-1})`: the size and every firm's last action.

    Attributes
    ----------
    fixed_costs : numpy.ndarray
        :math:`\theta_{FC,i}` per firm (their number is the number of firms).
    theta_rs, theta_ec, theta_rn : float
        Market-size effect, entry cost, and the effect of rivals.
    discount : float
        :math:`\beta`.
    size_transition : numpy.ndarray
        (L, L) row-stochastic transition of the market size.
    name : str
        A label for messages and tables.
    size_values : numpy.ndarray, optional
        The size :math:`s` in the payoff at each level (default 1, ..., L).

    Notes
    -----
    States are numbered :math:`x = s \cdot 2^N + \sum_i a_{i,t-1} 2^i` with :math:`s` the
    size's position (0 for level 1). Parameters are ordered ``fc_1, ..., fc_N, rs, ec, rn``.
    Reference: Aguirregabiria & Mira (2007), "Sequential estimation of dynamic discrete
    games", Econometrica 75, 1-53, section 5.
    """

    fixed_costs: np.ndarray
    theta_rs: float
    theta_ec: float
    theta_rn: float
    discount: float
    size_transition: np.ndarray = field(repr=False)
    name: str = "entry game"
    size_values: np.ndarray | None = field(default=None, repr=False)

    def __post_init__(self) -> None:
        fc = np.asarray(self.fixed_costs, dtype=np.float64).reshape(-1)
        if fc.size < 1 or fc.size > 10 or not np.all(np.isfinite(fc)):
            raise InputError(
                f"fixed_costs must hold 1 to 10 finite numbers (one per firm), got "
                f"{self.fixed_costs!r}."
            )
        F = np.asarray(self.size_transition, dtype=np.float64)
        if F.ndim != 2 or F.shape[0] != F.shape[1] or (F < 0).any() or np.max(
                np.abs(F.sum(axis=1) - 1)) > 1e-12:
            raise InputError("size_transition must be a square row-stochastic matrix.")
        if not 0 <= float(self.discount) < 1:
            raise InputError(f"discount must be in [0, 1), got {self.discount!r}.")
        values = np.arange(1.0, F.shape[0] + 1) if self.size_values is None else np.asarray(
            self.size_values, dtype=np.float64).reshape(-1)
        if values.shape != (F.shape[0],) or not np.all(np.isfinite(values)):
            raise InputError(f"size_values must hold {F.shape[0]} finite numbers, one per size "
                             f"level.")
        object.__setattr__(self, "fixed_costs", fc)
        object.__setattr__(self, "size_transition", F)
        object.__setattr__(self, "size_values", values)

    @property
    def n_firms(self) -> int:
        return int(self.fixed_costs.size)

    @property
    def size_levels(self) -> int:
        return int(self.size_transition.shape[0])

    @property
    def n_states(self) -> int:
        """:math:`L \\cdot 2^N` states."""
        return self.size_levels * 2 ** self.n_firms

    @property
    def parameters(self) -> tuple[str, ...]:
        return (*(f"fc_{i + 1}" for i in range(self.n_firms)), "rs", "ec", "rn")

    @property
    def theta(self) -> np.ndarray:
        """The true parameters in the order of :attr:`parameters`."""
        return np.r_[self.fixed_costs, self.theta_rs, self.theta_ec, self.theta_rn]

    def state_parts(self) -> tuple[np.ndarray, np.ndarray]:
        """Per state: the market size in the payoff (:attr:`size_values` of its level) and the
        (S, N) last actions."""
        S, N = self.n_states, self.n_firms
        x = np.arange(S)
        assert self.size_values is not None
        level = self.size_values[x // 2 ** N]
        last = (x[:, None] >> np.arange(N)[None, :]) & 1
        return level.astype(np.float64), last.astype(np.int64)


def am2007_game(experiment: int, *, theta_ec: float | None = None,
                theta_rn: float | None = None) -> EntryGame:
    """The Monte Carlo design of Aguirregabiria & Mira (2007, section 5).

    Parameters
    ----------
    experiment : int
        1 to 6 (:data:`AM2007_EXPERIMENTS`).
    theta_ec, theta_rn : float, optional
        Override the experiment's entry cost or rival effect (e.g. ``theta_rn=2.5`` with
        experiment 1 gives a design whose equilibrium is unstable under best responses).

    Returns
    -------
    EntryGame
        Five firms with fixed costs -1.9, -1.8, -1.7, -1.6, -1.5; theta_RS = 1; market size
        1 to 5 with transition rows (0.8, 0.2, 0, 0, 0), (0.2, 0.6, 0.2, 0, 0), ...,
        (0, 0, 0, 0.2, 0.8); beta = 0.95: 160 states.
    """
    if experiment not in AM2007_EXPERIMENTS:
        raise InputError(f"experiment must be one of 1-6, got {experiment!r}.")
    ec, rn = AM2007_EXPERIMENTS[experiment]
    ec = ec if theta_ec is None else float(theta_ec)
    rn = rn if theta_rn is None else float(theta_rn)
    return EntryGame(
        fixed_costs=np.array([-1.9, -1.8, -1.7, -1.6, -1.5]), theta_rs=1.0, theta_ec=ec,
        theta_rn=rn, discount=0.95, size_transition=_size_transition(5),
        name=f"AM2007 experiment {experiment} (theta_EC {ec:g}, theta_RN {rn:g})",
    )
