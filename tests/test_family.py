"""Tests of :mod:`orthoccp.simulate._family`: the design family's exact solutions, its
reproducibility, its span, the calibration and the oracle."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy.special import logsumexp

from _support import assert_bellman_fixed_point, dense, expect, row_flow

import orthoccp as oc
from orthoccp.simulate import EULER_GAMMA, Simulation, family_design, family_id, simulate
from orthoccp.simulate._design import CALIBRATION_TOL, MAX_SOLVED_STATES
from orthoccp.simulate._family import _cached_design, _draw, _option
from orthoccp.simulate._solve import solve

SEEDS = tuple(range(1, 11))


@pytest.fixture(scope="module")
def sims() -> dict[int, Simulation]:
    """Small panels of ten family designs (the identities hold at any size)."""
    return {s: family_design(s).simulate(units=120, periods=6, seed=100 + s) for s in SEEDS}


# ---------------------------------------------------------------------------
# Exact-solution identities (METHOD section 7.1) on every design
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("seed", SEEDS)
def test_bellman_fixed_point_and_hotz_miller(sims: dict[int, Simulation], seed: int) -> None:
    # Rust (1987): V = ln sum_j exp(u_j + beta E[V' | x, j]) + gamma_E, with dense matrices;
    # Hotz & Miller (1993): V(x) = v_R(x) - ln P_R(x) + gamma_E.
    sim = sims[seed]
    sol = sim.solution
    assert_bellman_fixed_point(sim)
    R = sim.choices.index(sim.anchor)
    np.testing.assert_allclose(
        sol.values[:, :, R] - sol.log_ccp[:, :, R] + EULER_GAMMA, sol.V, rtol=0, atol=1e-8
    )
    V_rows = sol.V[sim.unit_index, sim.state_index]
    np.testing.assert_allclose(
        sim.values[:, R] - np.log(sim.ccp[:, R]) + EULER_GAMMA, V_rows, rtol=0, atol=1e-8
    )


@pytest.mark.parametrize("seed", SEEDS)
def test_finite_dependence(sims: dict[int, Simulation], seed: int) -> None:
    # Arcidiacono & Miller (2011), with z_j(x)'theta the solved flow utilities:
    # renewal  v_j - v_R = z_j - z_R + beta (E[h | x, j] - E[h | x, R]), h = z_R - ln P_R;
    # terminal v_j - v_R = z_j - z_R + beta E[z_R - ln P_R + gamma_E | x, j].
    # The renewal identity holds only if the exogenous covariates move independently of the
    # choice, so it also checks that they do.
    sim = sims[seed]
    sol = sim.solution
    flow = sol.model.flow
    R = sim.choices.index(sim.anchor)
    mats = dense(sim)
    terminal = sim.kind == "terminal"
    h = flow[:, :, R] - sol.log_ccp[:, :, R] + (EULER_GAMMA if terminal else 0.0)
    for j, T in enumerate(mats):
        if j == R:
            assert (T is None) == terminal
            continue
        assert T is not None
        rhs = flow[:, :, j] - flow[:, :, R] + sim.discount * expect(T, h)
        if not terminal:
            T_R = mats[R]
            assert T_R is not None
            rhs -= sim.discount * expect(T_R, h)
        np.testing.assert_allclose(
            sol.values[:, :, j] - sol.values[:, :, R], rhs, rtol=0, atol=1e-8
        )


@pytest.mark.parametrize("seed", SEEDS)
def test_rows_match_solution_and_data(sims: dict[int, Simulation], seed: int) -> None:
    # Logit choice probabilities (McFadden 1973) and the continuation target
    # E[ln P_R(x') | x, j] of Arcidiacono & Miller (2011) at every row.
    sim = sims[seed]
    sol = sim.solution
    R = sim.choices.index(sim.anchor)
    np.testing.assert_allclose(sim.ccp.sum(axis=1), 1.0, rtol=0, atol=1e-12)
    np.testing.assert_allclose(
        np.log(sim.ccp), sim.values - logsumexp(sim.values, axis=1, keepdims=True), atol=1e-10
    )
    u, s = sim.unit_index, sim.state_index
    for j, T in enumerate(dense(sim)):
        if T is None:
            assert np.isnan(sim.continuation[:, j]).all()
            continue
        target = np.einsum("rs,rs->r", T[u, s], sol.log_ccp[u, :, R])
        np.testing.assert_allclose(sim.continuation[:, j], target, rtol=0, atol=1e-10)
    # The utility columns in the data give the solved flow utilities.
    np.testing.assert_allclose(row_flow(sim), sol.model.flow[u, s], atol=1e-12)
    # The exact nuisances: q = (z_R data columns, ln P_R), each E[q(x') | x, j].
    panel = sim.panel()
    nuis = sim.exact_nuisances(panel)
    order = [list(sim.choices).index(c) for c in panel.choices]
    np.testing.assert_array_equal(nuis.mu[:, :, -1], sim.continuation[:, order])
    zR = [c for c in sim.utility[sim.anchor].values() if c != "1"]
    assert nuis.mu.shape[2] == len(zR) + 1
    for k, column in enumerate(zR):
        for j, T in enumerate(dense(sim)):
            if T is not None:
                target = np.einsum("rs,rs->r", T[u, s], sim.grid_columns[column][u])
                np.testing.assert_allclose(nuis.mu[:, order.index(j), k], target, atol=1e-12)


@pytest.mark.parametrize("seed", SEEDS)
def test_exogenous_covariates_move_independently_of_choices(
    sims: dict[int, Simulation], seed: int
) -> None:
    sim = sims[seed]
    design = family_design(seed)
    values, Q, stat = design._exo_grid()
    M = Q.shape[0]
    np.testing.assert_allclose(stat @ Q, stat, atol=1e-12)  # the stationary law
    for T in dense(sim):
        if T is None:
            continue
        n, SM, _ = T.shape
        # Summing over the main state's destination leaves the exogenous chain Q.
        exo_marginal = T.reshape(n, SM, SM // M, M).sum(axis=2)
        np.testing.assert_allclose(exo_marginal, np.broadcast_to(np.tile(Q, (SM // M, 1)),
                                                                 exo_marginal.shape), atol=1e-12)
    data = sim.data
    for name in design.exo_names:
        assert (data.groupby(sim.unit)[name].nunique() > 1).any(), name  # varies over time
    for name in design.covariate_names:
        assert (data.groupby(sim.unit)[name].nunique() == 1).all()  # fixed per unit


# ---------------------------------------------------------------------------
# Reproducibility, ids and the span of the family
# ---------------------------------------------------------------------------


def test_same_seed_same_design_and_panel() -> None:
    a = family_design(4)
    _cached_design.cache_clear()
    b = family_design("F04")
    assert a is not b
    assert (a.id, a.description, dict(a.truth)) == (b.id, b.description, dict(b.truth))
    assert a.terms == b.terms and a.utility == b.utility
    sa, sb = a.simulate(units=80, periods=5, seed=3), b.simulate(units=80, periods=5, seed=3)
    pd.testing.assert_frame_equal(sa.data, sb.data)
    np.testing.assert_array_equal(sa.ccp, sb.ccp)
    other = a.simulate(units=80, periods=5, seed=4)
    assert not sa.data.equals(other.data)
    assert dict(other.truth) == dict(sa.truth)  # the panel seed leaves the design alone
    # simulate() takes the id and gives the same panel.
    pd.testing.assert_frame_equal(simulate("F04", units=80, periods=5, seed=3).data, sa.data)
    assert family_id(4) == "F04" and sa.scenario == "F04"


def test_the_family_spans_the_brief() -> None:
    drawn = [_draw(s, kind=None, n_choices=None, n_states=None, n_covariates=None,
                   n_exogenous=None, units=None, periods=None, discount=None)
             for s in range(200)]
    designs = [d for d, _ in drawn]
    shares = [sh for _, sh in drawn]
    assert {d.kind for d in designs} == {"renewal", "terminal"}
    assert {len(d.choices) for d in designs} == {2, 3, 4}
    assert {len(d.exo_levels) for d in designs} == {0, 1, 2}
    p = [d.n_covariates for d in designs]
    assert min(p) == 5 and max(p) == 50
    assert 500 <= min(d.units for d in designs) < 700
    assert 3500 < max(d.units for d in designs) <= 4000
    assert {d.periods for d in designs} == set(range(6, 21))
    beta = [d.discount for d in designs]
    assert 0.90 <= min(beta) < 0.91 and 0.97 < max(beta) <= 0.98
    assert min(shares) < 0.03 and max(shares) > 0.2  # rare to common anchors
    for d in designs:
        assert d.n_levels * max(1, int(np.prod(d.exo_levels))) <= MAX_SOLVED_STATES
        relevant = d._relevant()
        assert 3 <= len(relevant) <= 5 and len(relevant) < d.n_covariates or d.n_covariates == 5
        inter = f"{d.state}_x{d.interact}"
        assert any(inter in spec.values() for spec in d.utility.values())
        if d.kind == "terminal":
            assert dict(d.utility["exit"]) == {"scrap": "resale"}
    # Some designs have pure-noise covariates, and some a scrap value that moves over time.
    assert sum(len(d._relevant()) < d.n_covariates for d in designs) > 150
    assert any(d.resale_source == "e0" for d in designs)


def test_simulate_rejects_options_the_design_fixes() -> None:
    with pytest.raises(oc.InputError, match="discount=0.9 does not apply to the family design"):
        simulate("F04", discount=0.9)
    with pytest.raises(oc.InputError, match="not a family design id"):
        family_design("G4")
    with pytest.raises(oc.InputError, match="n_choices must be an integer in"):
        family_design(4, n_choices=5)
    with pytest.raises(oc.InputError, match="at most 60"):
        family_design(4, n_states=40, n_exogenous=2)
    with pytest.raises(oc.InputError, match="needs a renewal design"):
        family_design(4, kind="terminal", anchor_after_renewal=0.01)
    assert _option("discount", None, 0, 1, integer=False) is None


# ---------------------------------------------------------------------------
# Calibration to target characteristics
# ---------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("seed", "targets"),
    [
        (2, {"kind": "renewal", "n_choices": 2, "anchor_share": 0.06, "units": 2500,
             "periods": 10, "n_states": 12}),
        (3, {"kind": "terminal", "n_choices": 3, "anchor_share": 0.04, "units": 2500,
             "periods": 8}),
    ],
)
def test_calibration_hits_the_anchor_share(seed: int, targets: dict) -> None:
    design = family_design(seed, **targets)
    assert design.id == f"F{seed:02d}*"
    assert design.kind == targets["kind"] and len(design.choices) == targets["n_choices"]
    assert (design.units, design.periods) == (targets["units"], targets["periods"])
    # Exact expected share on the calibration sample: within the stated tolerance.
    assert abs(design.calibration["achieved"] - targets["anchor_share"]) <= CALIBRATION_TOL
    # A fresh panel: its observed share matches its own exact expected share within 4
    # unit-clustered standard errors, and the target within 0.01 (other covariate draws).
    sim = design.simulate(seed=9)
    expected = design.expected_shares(sim.solution)[design.anchor]
    is_anchor = (sim.data[sim.choice] == design.anchor).to_numpy(dtype=float)
    per_unit = pd.Series(is_anchor - expected).groupby(sim.data[sim.unit].to_numpy()).sum()
    se = np.sqrt((per_unit**2).sum()) / len(is_anchor)
    assert abs(is_anchor.mean() - expected) < 4 * se
    assert abs(expected - targets["anchor_share"]) < 0.01
    if "n_states" in targets:
        assert sim.data[design.state].max() < targets["n_states"] == design.n_levels


def test_calibration_of_the_anchor_after_a_renewal() -> None:
    design = family_design(2, kind="renewal", anchor_after_renewal=0.01)
    assert abs(design.calibration["achieved"] - 0.01) <= CALIBRATION_TOL
    # A rarer post-renewal anchor needs a costlier renewal.
    rarer = family_design(2, kind="renewal", anchor_after_renewal=0.002)
    assert rarer.truth["replace_cost"] < design.truth["replace_cost"]
    with pytest.raises(oc.InputError, match="out of reach"):
        family_design(2, kind="renewal", anchor_share=1e-15)


@pytest.mark.parametrize(
    ("seed", "targets"),
    [
        (1, {"stay": 0.8, "invest": 0.1, "shrink": 0.06, "exit": 0.04}),
        (20, {"keep": 0.85, "repair": 0.1, "replace": 0.05}),
    ],
)
def test_calibration_hits_every_choice_share(seed: int, targets: dict) -> None:
    design = family_design(seed, choice_shares=targets, n_states=10, n_exogenous=0)
    reached = design.calibration["shares"]
    for label, share in targets.items():
        assert abs(reached[label] - share) <= CALIBRATION_TOL, (label, reached[label])
    # The reached shares are the design's own exact expectation on the calibration sample.
    exact = design.expected_shares(solve(design.exact_model(design._calibration_covariates())))
    for label in targets:
        assert abs(exact[label] - targets[label]) <= CALIBRATION_TOL
    with pytest.raises(oc.InputError, match="must give a share for each of"):
        family_design(seed, choice_shares={"keep": 1.0})
    with pytest.raises(oc.InputError, match="give one share target"):
        family_design(seed, choice_shares=targets, anchor_share=0.1)


# ---------------------------------------------------------------------------
# Oracle: the exact nuisances recover the truth (METHOD section 7.2)
# ---------------------------------------------------------------------------


@pytest.mark.parametrize(("seed", "kind"), [(3, "terminal"), (9, "renewal")])
def test_oracle_within_three_se(seed: int, kind: str) -> None:
    # F03: terminal with an exogenous chain and a scrap value; F09: renewal with an exogenous
    # chain in the utility.
    design = family_design(seed)
    assert design.kind == kind and design.exo_levels
    sim = design.simulate(units=2000, periods=10, seed=5)
    panel, model = sim.panel(), sim.model()
    assert model.persistent == design.persistent
    res = oc.estimate(panel, model, nuisances=sim.exact_nuisances(panel, model), debias=False)
    truth = pd.Series(sim.truth)[res.params.index]
    z = (res.params - truth) / res.std_errors
    assert np.all(np.abs(z) < 3), z
    assert set(res.params.index) == set(sim.truth)


# ---------------------------------------------------------------------------
# The Monte Carlo harness takes a family id
# ---------------------------------------------------------------------------


def test_montecarlo_replicates_a_family_design() -> None:
    from orthoccp.montecarlo import run_montecarlo

    design = family_design(4)
    mc = run_montecarlo("F04", reps=1, units=100, periods=5, learner="logit", folds=3,
                        estimators=("oracle",))
    assert mc.truth == dict(design.truth)
    assert set(mc.summary["parameter"]) == set(design.truth)
    assert mc.failures["oracle"] == 0
    with pytest.raises(oc.InputError, match="n_covariates=5 does not apply"):
        run_montecarlo("F04", reps=1, units=100, periods=5, n_covariates=5)
