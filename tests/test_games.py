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

from orthoccp import InputError, OrthoCCPWarning
from orthoccp.dp import solve_values
from orthoccp.games import (
    AM2007_EXPERIMENTS,
    am2007_game,
    best_response,
    estimate_game,
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


# --------------------------------------------------------------------------- estimation
@pytest.fixture(scope="module")
def exp2() -> tuple:
    eq = solve_equilibrium(am2007_game(2))
    return eq, simulate_markets(eq, markets=400, periods=3, seed=5)


def test_two_step_is_two_logits_as_statsmodels_fits_them(exp2: tuple) -> None:
    # Reference: statsmodels' Logit for the first stage and its binomial GLM with an offset
    # for the pseudo-likelihood (Aguirregabiria & Mira 2007: a logit with offset e~ at P-hat).
    import statsmodels.api as sm

    from orthoccp.games import value_terms
    from orthoccp.games._estimate import _bind, _features

    eq, df = exp2
    res = estimate_game(df, discount=0.95, estimator="two-step")
    d = _bind(df, market="market", period="period", firm="firm", action="active",
              size="size", last="last_active", discount=0.95, size_transition=None)
    F = _features(d.structure)
    first = sm.Logit(d.action, F[d.firm, d.state]).fit(disp=0, tol=1e-12, maxiter=200)
    P = 1 / (1 + np.exp(-np.einsum("nsk,k->sn", F, first.params)))
    np.testing.assert_allclose(res.details.ccp.to_numpy(), P, atol=1e-8)
    vt = value_terms(d.structure, P)
    glm = sm.GLM(d.action, vt.zt[d.firm, d.state], family=sm.families.Binomial(),
                 offset=vt.et[d.firm, d.state]).fit(tol=1e-13)
    np.testing.assert_allclose(res.params.to_numpy(), glm.params, atol=1e-6)
    assert res.details.estimator == "two-step" and "first_stage" in res.decomposition.columns


def test_npl_is_a_fixed_point_and_recovers_the_truth() -> None:
    # Simulated data of a known equilibrium: a mechanics check (3 s.e.), and the fixed point
    # P = Psi(theta, P) that defines NPL (Aguirregabiria & Mira 2007, section 3.3).
    game = am2007_game(2)
    eq = solve_equilibrium(game)
    df = simulate_markets(eq, markets=3000, periods=3, seed=11)
    # the fixed point is that of the size chain used: give the true one
    res = estimate_game(df, discount=0.95, size_transition=game.size_transition)
    assert res.details.estimator == "npl" and res.details.spectral_radius < 1
    z = (res.params.to_numpy() - game.theta) / res.std_errors.to_numpy()
    assert np.all(np.abs(z) < 3), z
    P = res.details.ccp.to_numpy()
    np.testing.assert_allclose(best_response(game, P, res.params.to_numpy()), P, atol=1e-7)


def test_npl_jacobian_is_the_derivative_along_the_fixed_point(exp2: tuple) -> None:
    # G_theta + G_P (I - Psi_P)^-1 Psi_theta against brute force: re-solve P(theta) =
    # Psi(theta, P(theta)) by iteration at theta +- h and difference the summed score.
    from orthoccp.games._estimate import _bind, _fixed_point_term, _pieces, _total_score

    eq, df = exp2
    res = estimate_game(df, discount=0.95)
    d = _bind(df, market="market", period="period", firm="firm", action="active",
              size="size", last="last_active", discount=0.95, size_transition=None)
    theta, P = res.params.to_numpy(), res.details.ccp.to_numpy()
    zt, et = _pieces(d, P)
    lam = 1 / (1 + np.exp(-(zt @ theta + et)))
    analytic = -(zt * (lam * (1 - lam))[:, None]).T @ zt + _fixed_point_term(d, P, theta)

    def fixed_point(th: np.ndarray) -> np.ndarray:
        Q = P.copy()
        for _ in range(2000):
            new = best_response(d.structure, Q, th)
            if np.max(np.abs(new - Q)) < 1e-13:
                return new
            Q = new
        raise AssertionError("no fixed point")

    h = 1e-5
    brute = np.empty_like(analytic)
    for k in range(theta.size):
        e = np.zeros_like(theta)
        e[k] = h
        brute[:, k] = (_total_score(d, fixed_point(theta + e), theta + e)
                       - _total_score(d, fixed_point(theta - e), theta - e)) / (2 * h)
    np.testing.assert_allclose(analytic, brute, rtol=1e-4, atol=1e-4 * np.abs(brute).max())


def test_an_unstable_equilibrium_falls_back_to_two_step() -> None:
    game = am2007_game(1, theta_rn=2.5)
    eq = solve_equilibrium(game, max_iterations=200)
    df = simulate_markets(eq, markets=400, periods=3, seed=2)
    with pytest.warns(OrthoCCPWarning, match="two-step estimate is reported"):
        res = estimate_game(df, discount=0.95)
    assert res.details.estimator == "two-step" and res.details.requested == "npl"
    assert res.details.fallback and "two-step" in res.summary()


def test_game_results_travel_as_json(exp2: tuple) -> None:
    import orthoccp as oc

    res = estimate_game(exp2[1], discount=0.95)
    back = oc.Results.from_json(res.to_json())
    assert type(back).__name__ == "GameResults" and back.to_json() == res.to_json()
    assert "NPL iterations" in back.summary()


@pytest.mark.parametrize("change, message", [
    (lambda d: d.drop(index=3), r"one row per firm \(5 firms\); market 0, period 0 has 4"),
    (lambda d: d.assign(active=d["active"] * 2), r"column 'active' must hold 0 \(inactive\) or 1"),
    (lambda d: d.drop(columns="size"), r"data has no column size='size'"),
])
def test_bad_game_data_is_named(exp2: tuple, change, message: str) -> None:  # type: ignore[no-untyped-def]
    with pytest.raises(InputError, match=message):
        estimate_game(change(exp2[1]), discount=0.95)
