"""Dynamic games: entry and exit with rivals (Aguirregabiria & Mira 2007).

The first part of the games front door: the entry-exit game, its Markov perfect equilibria
solved exactly (best-response iteration, Newton's method for equilibria that best responses
cannot reach, the stability of an equilibrium), panels of markets simulated from them, and
the two-step and NPL estimators on discrete states with a parametric first stage.

* :class:`EntryGame`, :func:`am2007_game` -- the game and the Monte Carlo design of
  Aguirregabiria & Mira (2007, section 5);
* :func:`solve_equilibrium`, :class:`Equilibrium`, :func:`best_response`,
  :func:`value_terms` -- equilibria and the Hotz--Miller valuation behind them;
* :func:`simulate_markets` -- a panel of markets (one row per firm, market and period);
* :func:`estimate_game` -- two-step pseudo-likelihood and NPL on discrete states, clustered
  by market (:class:`GameResults`, :class:`GameDetails`).

Assumptions: i.i.d. type-I extreme-value private shocks, a known discount factor, and data
from one Markov perfect equilibrium.
"""

from ._design import AM2007_EXPERIMENTS, EntryGame, am2007_game
from ._equilibrium import (
    Equilibrium,
    ValueTerms,
    best_response,
    psi_radius,
    solve_equilibrium,
    value_terms,
)
from ._estimate import GAME_ASSUMPTIONS, GameDetails, GameResults, estimate_game
from ._simulate import simulate_markets

__all__ = [
    "AM2007_EXPERIMENTS",
    "GAME_ASSUMPTIONS",
    "GameDetails",
    "GameResults",
    "estimate_game",
    "psi_radius",
    "EntryGame",
    "Equilibrium",
    "ValueTerms",
    "am2007_game",
    "best_response",
    "simulate_markets",
    "solve_equilibrium",
    "value_terms",
]
