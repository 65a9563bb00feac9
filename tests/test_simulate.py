"""Tests of :mod:`orthoccp.simulate`: exact-solution identities, panel structure, inputs."""

from __future__ import annotations

import time
from typing import Any

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from scipy.special import logsumexp

from _support import assert_bellman_fixed_point, dense, expect, row_flow

from orthoccp.simulate import EULER_GAMMA, Simulation, scenario_names, simulate
from orthoccp.simulate._scenarios import SCENARIOS, draw_covariates, wear_rate
from orthoccp.simulate._solve import Model, Transition, bellman, solve

NAMES = ("ebike", "ebike3", "producers")


@pytest.fixture(scope="module")
def small() -> dict[str, Simulation]:
    """Small panels for the exact identities."""
    return {name: simulate(name, units=400, periods=12, seed=11) for name in NAMES}


@pytest.fixture(scope="module")
def medium() -> dict[str, Simulation]:
    """The 2000 x 12 panels used for the share targets."""
    return {name: simulate(name, units=2000, periods=12, seed=0) for name in NAMES}


def level_flow(sim: Simulation) -> np.ndarray:
    """``z_j(x)'theta`` at every main-state level, built from ``utility`` and ``truth``."""
    scenario = SCENARIOS[sim.scenario]
    columns = scenario.state_columns(np.arange(scenario.n_levels))
    flow = np.zeros((scenario.n_levels, len(sim.choices)))
    for j, label in enumerate(sim.choices):
        for param, column in sim.utility[label].items():
            flow[:, j] += sim.truth[param] * (1.0 if column == "1" else columns[column])
    return flow


# ---------------------------------------------------------------------------
# Exact-solution identities
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("name", NAMES)
def test_bellman_fixed_point(small: dict[str, Simulation], name: str) -> None:
    # Rust (1987): V is the fixed point of the logit social-surplus Bellman operator,
    # V = ln sum_j exp(u_j + beta E[V' | x, j]) + gamma_E; checked with dense matrices.
    sim = small[name]
    sol = sim.solution
    np.testing.assert_allclose(sol.model.flow, np.broadcast_to(level_flow(sim), sol.values.shape))
    assert_bellman_fixed_point(sim)


@pytest.mark.parametrize("name", NAMES)
def test_hotz_miller_inversion(small: dict[str, Simulation], name: str) -> None:
    # Hotz & Miller (1993) inversion: V(x) = v_R(x) - ln P_R(x) + gamma_E.
    sim = small[name]
    sol = sim.solution
    R = sim.choices.index(sim.anchor)
    # At every unit and state of the solution.
    np.testing.assert_allclose(
        sol.values[:, :, R] - np.log(sol.ccp[:, :, R]) + EULER_GAMMA, sol.V, rtol=0, atol=1e-8
    )
    # At the data rows, from the public arrays.
    V_rows = sol.V[sim.unit_index, sim.state_index]
    np.testing.assert_allclose(
        sim.values[:, R] - np.log(sim.ccp[:, R]) + EULER_GAMMA, V_rows, rtol=0, atol=1e-8
    )


@pytest.mark.parametrize("name", ["ebike", "ebike3"])
def test_renewal_finite_dependence(small: dict[str, Simulation], name: str) -> None:
    # Arcidiacono & Miller (2011) finite dependence with a renewal anchor R:
    # v_j - v_R = [z_j - z_R]'theta + beta (E[h(x') | x, j] - E[h(x') | x, R]),
    # h(x') = z_R(x')'theta - ln P_R(x').
    sim = small[name]
    sol = sim.solution
    R = sim.choices.index(sim.anchor)
    flow = level_flow(sim)
    h = flow[None, :, R] - sol.log_ccp[:, :, R]
    mats = dense(sim)
    for j, T in enumerate(mats):
        assert T is not None
        rhs = flow[None, :, j] - flow[None, :, R] + sim.discount * (
            expect(T, h) - expect(mats[R], h)
        )
        np.testing.assert_allclose(
            sol.values[:, :, j] - sol.values[:, :, R], rhs, rtol=0, atol=1e-8
        )


def test_terminal_finite_dependence(small: dict[str, Simulation]) -> None:
    # Arcidiacono & Miller (2011) finite dependence with a terminal anchor R:
    # v_j - v_R = [z_j - z_R]'theta + beta E[z_R(x')'theta - ln P_R(x') + gamma_E | x, j].
    sim = small["producers"]
    sol = sim.solution
    R = sim.choices.index(sim.anchor)
    flow = level_flow(sim)
    np.testing.assert_array_equal(sol.values[:, :, R], 0.0)  # exit pays 0, no continuation
    h = flow[None, :, R] - sol.log_ccp[:, :, R] + EULER_GAMMA
    for j, T in enumerate(dense(sim)):
        if j == R:
            assert T is None
            continue
        rhs = flow[None, :, j] - flow[None, :, R] + sim.discount * expect(T, h)
        np.testing.assert_allclose(
            sol.values[:, :, j] - sol.values[:, :, R], rhs, rtol=0, atol=1e-8
        )


@pytest.mark.parametrize("name", NAMES)
def test_continuation_is_transition_weighted_log_anchor_ccp(
    small: dict[str, Simulation], name: str
) -> None:
    # Arcidiacono & Miller (2011): the continuation target E[ln P_R(x') | x, j].
    sim = small[name]
    R = sim.choices.index(sim.anchor)
    log_anchor = np.log(sim.solution.ccp[:, :, R])
    u, s = sim.unit_index, sim.state_index
    for j, T in enumerate(dense(sim)):
        if T is None:
            assert sim.kind == "terminal" and j == R
            assert np.isnan(sim.continuation[:, j]).all()
            continue
        target = np.einsum("rs,rs->r", T[u, s], log_anchor[u])
        np.testing.assert_allclose(sim.continuation[:, j], target, rtol=0, atol=1e-10)
    assert np.isfinite(np.delete(sim.continuation, R, axis=1)).all()


@pytest.mark.parametrize("name", NAMES)
def test_row_arrays_match_solution_and_data(small: dict[str, Simulation], name: str) -> None:
    # Logit choice probabilities (McFadden 1973): P_j = exp(v_j) / sum_k exp(v_k).
    sim = small[name]
    n, J = len(sim.data), len(sim.choices)
    for arr in (sim.ccp, sim.values, sim.continuation):
        assert arr.shape == (n, J)
    assert ((sim.ccp > 0) & (sim.ccp < 1)).all()
    np.testing.assert_allclose(sim.ccp.sum(axis=1), 1.0, rtol=0, atol=1e-12)
    np.testing.assert_allclose(
        np.log(sim.ccp), sim.values - logsumexp(sim.values, axis=1, keepdims=True), atol=1e-10
    )
    np.testing.assert_array_equal(sim.data[SCENARIOS[name].state].to_numpy(), sim.state_index)
    np.testing.assert_array_equal(sim.data[sim.unit].to_numpy(), sim.unit_index)
    # Flow utilities from the data columns agree with those of the solved model.
    np.testing.assert_allclose(
        row_flow(sim), sim.solution.model.flow[sim.unit_index, sim.state_index], atol=1e-12
    )


def test_newton_start_matches_plain_value_iteration() -> None:
    # Bellman contraction (Rust 1987): successive approximation from V = 0 and the
    # Newton-Kantorovich start reach the same fixed point.
    X = draw_covariates(np.random.default_rng(3), 150, 6)
    for scenario in SCENARIOS.values():
        model = scenario.model(X, scenario.default_discount)
        plain = solve(model, newton=False)
        fast = solve(model)
        assert plain.newton_steps == 0 and plain.iterations > 100
        assert plain.change < 1e-12 and fast.change < 1e-12
        bound = model.discount / (1 - model.discount) * 1e-12 + 1e-13
        assert np.max(np.abs(plain.V - fast.V)) <= bound


@settings(max_examples=25, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    n_states=st.integers(1, 6),
    n_choices=st.integers(2, 4),
    slots=st.integers(1, 3),
    discount=st.floats(0.0, 0.98),
    terminal=st.booleans(),
)
def test_solver_on_random_models(
    seed: int, n_states: int, n_choices: int, slots: int, discount: float, terminal: bool
) -> None:
    # Rust (1987) fixed point and Hotz & Miller (1993) inversion on arbitrary models.
    rng = np.random.default_rng(seed)
    n_units = 3
    flow = rng.normal(scale=2.0, size=(n_units, n_states, n_choices))
    transitions: list[Transition | None] = []
    for _ in range(n_choices):
        prob = rng.dirichlet(np.ones(slots), size=(n_units, n_states))
        dest = rng.integers(0, n_states, size=(n_states, slots))
        transitions.append(Transition(dest=dest, prob=prob))
    anchor = int(rng.integers(n_choices))
    if terminal:
        transitions[anchor] = None
    model = Model(
        flow=flow,
        transitions=tuple(transitions),
        discount=discount,
        anchor=anchor,
        kind="terminal" if terminal else "renewal",
    )
    sol = solve(model)
    np.testing.assert_allclose(bellman(model, sol.V), sol.V, rtol=0, atol=1e-10)
    np.testing.assert_allclose(sol.ccp.sum(axis=2), 1.0, atol=1e-12)
    np.testing.assert_allclose(
        sol.values[:, :, anchor] - sol.log_ccp[:, :, anchor] + EULER_GAMMA, sol.V, atol=1e-8
    )
    for tr in transitions:
        if tr is not None:
            np.testing.assert_allclose(tr.expect(sol.V), expect(tr.matrix(), sol.V), atol=1e-12)
            np.testing.assert_allclose(tr.matrix().sum(axis=2), 1.0, atol=1e-12)


# ---------------------------------------------------------------------------
# Panel structure and targets
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("name", NAMES)
def test_panel_structure(medium: dict[str, Simulation], name: str) -> None:
    sim = medium[name]
    data = sim.data
    scenario = SCENARIOS[name]
    expected = [sim.unit, sim.period, sim.choice, *sim.states, scenario.scaled]
    assert sorted(data.columns) == sorted(expected)
    assert sim.states == (scenario.state, *(f"x{i}" for i in range(scenario.default_covariates)))
    assert sim.persistent == sim.states[1:]
    for params in sim.utility.values():
        for column in params.values():
            assert column == "1" or column in data.columns
    assert set(sim.truth) == {p for params in sim.utility.values() for p in params}
    assert set(data[sim.choice].unique()) == set(sim.choices)  # every choice observed
    assert pd.api.types.is_integer_dtype(data[sim.period])
    assert pd.api.types.is_integer_dtype(data[sim.unit])
    assert data.index.equals(pd.RangeIndex(len(data)))
    # Sorted by unit then period; periods consecutive from 0 within each unit.
    keys = data[[sim.unit, sim.period]].to_numpy()
    assert (np.lexsort((keys[:, 1], keys[:, 0])) == np.arange(len(data))).all()
    per_unit = data.groupby(sim.unit)[sim.period]
    np.testing.assert_array_equal(data[sim.period].to_numpy(), per_unit.cumcount().to_numpy())
    # Covariates are time-invariant within a unit.
    assert (data.groupby(sim.unit)[list(sim.persistent)].nunique() == 1).all().all()
    counts = per_unit.size()
    assert counts.index.tolist() == list(range(2000))
    if sim.kind == "renewal":
        assert (counts == 12).all()
    else:
        # Terminal: exit is the unit's last row; units without exit have all periods.
        last = ~data[sim.unit].duplicated(keep="last")
        exits = data[sim.choice] == sim.anchor
        assert not (exits & ~last).any()
        assert (counts[data.loc[last & ~exits, sim.unit]] == 12).all()
        assert counts.between(1, 12).all() and counts.min() < 12


@pytest.mark.parametrize(
    ("name", "bounds"),
    [
        ("ebike", {"keep": (0.85, 0.92), "swap": (0.08, 0.15)}),
        ("ebike3", {"keep": (0.5, 0.9), "recondition": (0.05, 0.3), "swap": (0.05, 0.3)}),
        ("producers", {"stay": (0.9, 0.97), "exit": (0.03, 0.10)}),
    ],
)
def test_choice_shares(
    medium: dict[str, Simulation], name: str, bounds: dict[str, tuple[float, float]]
) -> None:
    sim = medium[name]
    shares = sim.data[sim.choice].value_counts(normalize=True)
    for label, (low, high) in bounds.items():
        assert low <= shares[label] <= high, (label, shares[label])
    # Law of large numbers: observed shares match the mean exact CCPs.
    se = np.sqrt(sim.ccp.mean(axis=0) * (1 - sim.ccp.mean(axis=0)) / len(sim.data))
    observed = np.array([shares[label] for label in sim.choices])
    assert (np.abs(observed - sim.ccp.mean(axis=0)) < 5 * se).all()


@pytest.mark.parametrize("name", NAMES)
def test_anchor_spread_over_states(medium: dict[str, Simulation], name: str) -> None:
    # The anchor choice is taken over a range of main-state levels, not at one threshold.
    sim = medium[name]
    rows = sim.data[sim.choice] == sim.anchor
    levels = sim.data.loc[rows, SCENARIOS[name].state]
    assert levels.nunique() >= 6
    assert levels.quantile(0.9) - levels.quantile(0.1) >= 3
    R = sim.choices.index(sim.anchor)
    assert sim.ccp[rows.to_numpy(), R].mean() < 0.6


@pytest.mark.parametrize("name", NAMES)
def test_simulated_transitions_follow_the_model(medium: dict[str, Simulation], name: str) -> None:
    # Pearson chi-square goodness of fit of next-period states to the exact transitions.
    sim = medium[name]
    data = sim.data
    same_unit = data[sim.unit].to_numpy()[1:] == data[sim.unit].to_numpy()[:-1]
    rows = np.flatnonzero(same_unit)
    chosen = pd.Categorical(data[sim.choice], categories=list(sim.choices)).codes[rows]
    nxt = sim.state_index[rows + 1]
    mats = dense(sim)
    for j, T in enumerate(mats):
        if T is None:
            continue
        pick = rows[chosen == j]
        expected = T[sim.unit_index[pick], sim.state_index[pick]].sum(axis=0)
        observed = np.bincount(nxt[chosen == j], minlength=expected.size)
        keep = expected >= 5
        assert observed[~keep].sum() <= max(5.0, 3 * expected[~keep].sum())
        exp_k, obs_k = expected[keep], observed[keep]
        chi2 = ((obs_k - exp_k) ** 2 / exp_k).sum()
        assert stats.chi2.sf(chi2, df=max(keep.sum() - 1, 1)) > 1e-4


def test_wear_depends_nonlinearly_on_few_covariates() -> None:
    X = draw_covariates(np.random.default_rng(5), 4000, 30)
    rate = wear_rate(X)
    assert rate.std() > 0.1
    Z = X.copy()
    Z[:, 5:] = np.random.default_rng(6).standard_normal((4000, 25))
    np.testing.assert_array_equal(wear_rate(Z), rate)  # x5.. are irrelevant
    logit = np.log(rate / (1 - rate))
    design = np.column_stack([np.ones(len(X)), X])
    fitted = design @ np.linalg.lstsq(design, logit, rcond=None)[0]
    r2 = 1 - ((logit - fitted) ** 2).sum() / ((logit - logit.mean()) ** 2).sum()
    assert r2 < 0.5  # a linear index misses most of the variation
    assert set(np.unique(X[:, 2])) == {0.0, 1.0}


# ---------------------------------------------------------------------------
# Options, reproducibility, specification
# ---------------------------------------------------------------------------


def test_scenario_names() -> None:
    assert scenario_names() == NAMES


@pytest.mark.parametrize("name", NAMES)
def test_reproducible(name: str) -> None:
    a = simulate(name, units=200, periods=8, seed=7)
    b = simulate(name, units=200, periods=8, seed=7)
    c = simulate(name, units=200, periods=8, seed=8)
    pd.testing.assert_frame_equal(a.data, b.data)
    for field in ("ccp", "values", "continuation"):
        np.testing.assert_array_equal(getattr(a, field), getattr(b, field))
    assert a.seed == 7 and c.seed == 8
    assert not a.data.equals(c.data)


@pytest.mark.parametrize(
    ("name", "discount", "truth", "choices", "anchor", "kind"),
    [
        ("ebike", 0.95, {"wear_cost": -1.0, "swap_cost": -5.0}, ("keep", "swap"), "swap", "renewal"),
        (
            "ebike3",
            0.95,
            {"wear_cost": -1.0, "recondition_cost": -3.5, "swap_cost": -5.0},
            ("keep", "recondition", "swap"),
            "swap",
            "renewal",
        ),
        ("producers", 0.95, {"fixed_cost": -2.0, "profit": 1.0}, ("stay", "exit"), "exit", "terminal"),
    ],
)
def test_defaults_and_spec(
    name: str,
    discount: float,
    truth: dict[str, float],
    choices: tuple[str, ...],
    anchor: str,
    kind: str,
) -> None:
    sim = simulate(name, units=50, periods=3)
    assert repr(sim).startswith(f"Simulation(scenario={name!r}")
    assert (sim.scenario, sim.seed, sim.discount) == (name, 0, discount)
    assert sim.truth == truth and sim.choices == choices
    assert (sim.anchor, sim.kind) == (anchor, kind)
    spec = sim.spec()
    assert spec == {
        "data": {
            "unit": sim.unit,
            "period": sim.period,
            "choice": sim.choice,
            "states": list(sim.states),
        },
        "model": {"kind": kind, "anchor": anchor, "discount": discount},
        "utility": sim.utility,
    }

    def plain(obj: Any) -> bool:
        if isinstance(obj, dict):
            return all(type(k) is str and plain(v) for k, v in obj.items())
        if isinstance(obj, list):
            return all(plain(v) for v in obj)
        return type(obj) in (str, float, int)

    assert plain(spec)
    if kind == "terminal":
        assert sim.utility[anchor] == {}


def test_static_logit_at_zero_discount() -> None:
    # McFadden (1973) static logit: with beta = 0, v_j = u_j.
    sim = simulate("ebike3", units=100, periods=4, seed=2, discount=0.0)
    assert sim.discount == 0.0
    np.testing.assert_allclose(sim.values, row_flow(sim), atol=1e-12)
    np.testing.assert_allclose(
        sim.ccp, np.exp(row_flow(sim) - logsumexp(row_flow(sim), axis=1, keepdims=True))
    )
    sim = simulate("producers", units=100, periods=4, seed=2, discount=0.0)
    np.testing.assert_allclose(sim.values, row_flow(sim), atol=1e-12)


@pytest.mark.parametrize("name", NAMES)
def test_smallest_panel_and_numpy_integers(name: str) -> None:
    sim = simulate(name, units=np.int64(1), periods=1, seed=np.int64(4))  # type: ignore[arg-type]
    assert len(sim.data) == 1 and sim.seed == 4 and type(sim.seed) is int
    assert sim.data[sim.period].tolist() == [0]


def test_n_covariates_option() -> None:
    sim = simulate("producers", units=30, periods=2, n_covariates=7)
    assert sim.states == ("demand", *(f"x{i}" for i in range(7)))
    assert sim.covariates.shape == (30, 7)


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"scenario": "bikes"}, "unknown scenario 'bikes'.*'ebike', 'ebike3', 'producers'"),
        ({"units": 0}, "units .*got 0"),
        ({"units": 2.5}, "units .*got 2.5"),
        ({"units": True}, "units"),
        ({"periods": 0}, "periods .*got 0"),
        ({"periods": -3}, "periods .*got -3"),
        ({"seed": -1}, "seed .*got -1"),
        ({"discount": 1.0}, r"discount must be in \[0, 1\), got 1\.0; the infinite-horizon model"),
        ({"discount": -0.1}, "discount .*got -0.1"),
        ({"discount": float("nan")}, "discount .*got nan"),
        ({"discount": "0.9"}, "discount"),
        ({"n_covariates": 4}, "n_covariates .*got 4"),
    ],
)
def test_bad_inputs(kwargs: dict[str, Any], match: str) -> None:
    options = {"scenario": "ebike", "units": 10, "periods": 2, **kwargs}
    scenario = options.pop("scenario")
    with pytest.raises(ValueError, match=match):
        simulate(scenario, **options)


@pytest.mark.parametrize("name", NAMES)
def test_timing_5000_by_20(name: str) -> None:
    start = time.perf_counter()
    sim = simulate(name, units=5000, periods=20, seed=1)
    elapsed = time.perf_counter() - start
    assert elapsed < 10.0, elapsed
    assert sim.data[sim.unit].nunique() == 5000
