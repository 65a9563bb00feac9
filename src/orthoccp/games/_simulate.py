"""Panels of markets simulated from an equilibrium of an entry game."""

from __future__ import annotations

import numpy as np
import pandas as pd

from .._errors import InputError
from ._equilibrium import Equilibrium

__all__ = ["simulate_markets"]


def simulate_markets(equilibrium: Equilibrium, *, markets: int, periods: int,
                     seed: int = 0) -> pd.DataFrame:
    """Simulate ``markets`` independent markets for ``periods`` periods.

    Parameters
    ----------
    equilibrium : Equilibrium
        The equilibrium every market plays (:func:`solve_equilibrium`).
    markets, periods : int
        Panel size; every market starts from the equilibrium's stationary distribution of
        the state, so the first period is a draw from the long-run distribution.
    seed : int, default=0
        Drives every draw.

    Returns
    -------
    pandas.DataFrame
        One row per firm, market and period: ``market``, ``period``, ``firm`` (1 to N),
        ``active`` (0/1), ``size`` (the market size level) and ``last_active`` (the firm's
        action the period before; in period 0, from the stationary draw), with the state
        index ``state`` and the firm's equilibrium probability of being active ``ccp``.
    """
    for name, v in (("markets", markets), ("periods", periods)):
        if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < 1:
            raise InputError(f"{name} must be a positive integer, got {v!r}.")
    game = equilibrium.game
    N, A = game.n_firms, 2 ** game.n_firms
    rng = np.random.default_rng(seed)
    state = rng.choice(game.n_states, size=markets, p=equilibrium.stationary())
    bits = np.arange(N)
    cum_size = np.cumsum(game.size_transition, axis=1)
    out = []
    for t in range(periods):
        size_index = state // A
        last = (state[:, None] >> bits[None, :]) & 1
        p = equilibrium.ccp[state]  # (markets, N)
        active = (rng.random((markets, N)) < p).astype(np.int64)
        out.append(pd.DataFrame({
            "market": np.repeat(np.arange(markets), N),
            "period": t,
            "firm": np.tile(bits + 1, markets),
            "active": active.ravel(),
            "size": np.repeat(size_index + 1, N),
            "last_active": last.ravel(),
            "state": np.repeat(state, N),
            "ccp": p.ravel(),
        }))
        u = rng.random(markets)
        next_size = (u[:, None] > cum_size[size_index]).sum(axis=1)
        state = next_size * A + (active << bits[None, :]).sum(axis=1)
    return pd.concat(out, ignore_index=True).sort_values(
        ["market", "period", "firm"], kind="stable").reset_index(drop=True)
