"""Specification of orthoccp.games: the entry-exit game and its exact equilibria.

Outside references: the Monte Carlo design of Aguirregabiria & Mira (2007, Econometrica 75,
section 5: fixed costs, market-size chain, the six experiments); the Representation Lemma of
the same paper (an equilibrium is a fixed point of the best-response mapping Psi, which the
Bellman residual checks independently); and, without rival effects (theta_RN = 0), the
single-agent dynamic programme of each firm solved by orthoccp.dp.solve_values on its own
10-state space. The spectral radii 0.92 (experiment 3) and 1.16 (theta_EC = 1, theta_RN = 2.5)
were measured before this code was written and are quoted in issue 27 ("Dynamic games");
the tolerance 0.005 is half their last printed digit.
"""

from __future__ import annotations

import numpy as np
import pytest

from orthoccp import InputError
from orthoccp.dp import solve_values
from orthoccp.games import (
    AM2007_EXPERIMENTS,
    am2007_game,
    best_response,
    simulate_markets,
    solve_equilibrium,
)


def test_design_constants_are_the_papers() -> None:
    g = am2007_game(3)
    assert (g.n_firms, g.size_levels, g.n_states, g.discount) == (5, 5, 160, 0.95)
    np.testing.assert_array_equal(g.theta, [-1.9, -1.8, -1.7, -1.6, -1.5, 1.0, 1.0, 2.0])
    np.testing.assert_allclose(g.size_transition[0], [0.8, 0.2, 0, 0, 0])
    np.testing.assert_allclose(g.size_transition[2], [0, 0.2, 0.6, 0.2, 0])
    np.testing.assert_allclose(g.size_transition[4], [0, 0, 0, 0.2, 0.8])
    assert g.parameters == ("fc_1", "fc_2", "fc_3", "fc_4", "fc_5", "rs", "ec", "rn")
    with pytest.raises(InputError, match="experiment must be one of 1-6"):
        am2007_game(7)


@pytest.mark.parametrize("experiment", sorted(AM2007_EXPERIMENTS))
def test_every_experiment_has_one_exact_equilibrium(experiment: int) -> None:
    g = am2007_game(experiment)
    eq = solve_equilibrium(g)
    assert eq.method == "iteration"  # best responses converge in all six (issue 27)
    assert eq.best_response_residual < 1e-10 and eq.bellman_residual < 1e-10
    # Other starts end at the same equilibrium (issue 27: one equilibrium in every experiment).
    for start in (0.05, 0.95, np.random.default_rng(experiment).uniform(0.01, 0.99, (160, 5))):
        other = solve_equilibrium(g, start=start)
        np.testing.assert_allclose(other.ccp, eq.ccp, atol=1e-9)


def test_without_rival_effects_each_firm_solves_its_own_programme() -> None:
    # theta_RN = 0: a firm's payoff and its own state (size, last action) do not depend on
    # the rivals, so its equilibrium CCP is its single-agent optimum on 10 states.
    g = am2007_game(1)
    eq = solve_equilibrium(g)
    L, beta = g.size_levels, g.discount
    level = np.repeat(np.arange(1, L + 1), 2).astype(float)  # own state (size, last action)
    last = np.tile([0, 1], L)
    size_index = np.repeat(np.arange(L), 2)
    F = np.zeros((2, 2 * L, 2 * L))  # next own state: size by the chain, last = the action
    for d in (0, 1):
        for s in range(2 * L):
            F[d, s, np.arange(L) * 2 + d] = g.size_transition[size_index[s]]
    for i in range(g.n_firms):
        flow = g.fixed_costs[i] + g.theta_rs * level - g.theta_ec * (1 - last)

        def choice_values(V: np.ndarray) -> np.ndarray:
            cont = np.stack([F[0] @ V[0], F[1] @ V[0]], axis=-1)
            return (np.stack([np.zeros(2 * L), flow], axis=-1) + beta * cont)[None]

        def newton_matrix(P: np.ndarray) -> np.ndarray:
            return (np.eye(2 * L) - beta * (P[0, :, :1] * F[0] + P[0, :, 1:] * F[1]))[None]

        sol = solve_values(choice_values, newton_matrix, np.zeros((1, 2 * L)))
        single = sol.ccp[0, :, 1]
        own = (np.arange(g.n_states) // 32) * 2 + ((np.arange(g.n_states) >> i) & 1)
        np.testing.assert_allclose(eq.ccp[:, i], single[own], atol=1e-10)


def test_stability_of_the_equilibria() -> None:
    stable = solve_equilibrium(am2007_game(3))
    assert stable.spectral_radius == pytest.approx(0.92, abs=0.005)
    # theta_EC = 1, theta_RN = 2.5: unstable under best responses; Newton's method finds it.
    game = am2007_game(1, theta_rn=2.5)
    unstable = solve_equilibrium(game, max_iterations=200)
    assert unstable.method == "newton"
    assert unstable.best_response_residual < 1e-10 and unstable.bellman_residual < 1e-10
    assert unstable.spectral_radius == pytest.approx(1.16, abs=0.005)
    with pytest.raises(Exception, match="no equilibrium"):
        solve_equilibrium(game, max_iterations=200, newton=False)


def test_best_response_of_the_equilibrium_is_itself_and_moves_elsewhere() -> None:
    g = am2007_game(2)
    eq = solve_equilibrium(g)
    np.testing.assert_allclose(best_response(g, eq.ccp), eq.ccp, atol=1e-12)
    assert np.max(np.abs(best_response(g, np.full((160, 5), 0.5)) - 0.5)) > 0.05


def test_simulated_markets_follow_the_equilibrium() -> None:
    eq = solve_equilibrium(am2007_game(2))
    df = simulate_markets(eq, markets=4000, periods=3, seed=1)
    assert len(df) == 4000 * 3 * 5 and list(df.columns) == [
        "market", "period", "firm", "active", "size", "last_active", "state", "ccp"]
    # actions follow the CCPs: the mean residual is zero within 4 of its standard errors
    resid = df["active"] - df["ccp"]
    assert abs(resid.mean()) < 4 * np.sqrt((df["ccp"] * (1 - df["ccp"])).mean() / len(df))
    # the last action of period t + 1 is the action of period t
    wide = df.pivot_table(index=["market", "firm"], columns="period", values=["active", "last_active"])
    np.testing.assert_array_equal(wide[("last_active", 1)], wide[("active", 0)])
    np.testing.assert_array_equal(wide[("last_active", 2)], wide[("active", 1)])
    # the same seed gives the same panel
    assert simulate_markets(eq, markets=50, periods=2, seed=3).equals(
        simulate_markets(eq, markets=50, periods=2, seed=3))
