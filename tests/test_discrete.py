"""Specification of orthoccp.discrete: inversion, transitions, NPL, forward simulation, anchor check.

Outside references: the full-solution Bellman solver and NFXP MLE of orthoccp.reference
(Rust 1987) for the identities of Hotz & Miller (1993) and Aguirregabiria & Mira (2002);
statsmodels' Logit and MNLogit for the static (discount 0) case, with Greene's published
logit estimates on the Spector & Mazzeo (1980) data.
"""

from __future__ import annotations

import doctest
import importlib
import json

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

import orthoccp as oc
from orthoccp.discrete import (
    DiscreteResults,
    bin_states,
    build_problem,
    check_anchor_probability,
    estimate_discrete,
    estimate_transition_matrices,
    hotz_miller_values,
    simulate_continuation,
    state_space,
)
from orthoccp.discrete._inversion import inversion_terms
from orthoccp.discrete._scenario import CHOICES, INVENTORY, simulate_inventory
from orthoccp.reference import SU_JUDD_BUS, NFXPProblem, simulate_bus, solve_bellman, solve_bus

BUS = SU_JUDD_BUS


@pytest.fixture(scope="module")
def inventory_panel() -> oc.Panel:
    df = simulate_inventory(units=300, periods=20, seed=7)
    return oc.Panel(df, unit="shop", period="period", choice="order", states=["stock"])


def _bus_npl(panel: oc.Panel, **kw: object) -> DiscreteResults:
    return estimate_discrete(panel, utility=BUS.utility_spec(), discount=BUS.discount,
                             n_states=BUS.n_states, transitions="increments",
                             reset_choices=["replace"], **kw)


# --------------------------------------------------------------------------- inversion
def test_inversion_equals_value_function_bus() -> None:
    # Hotz & Miller (1993, Prop. 1): at the model's CCPs the inversion returns its value
    # function; the Bellman solve is to sup-norm 1e-12, so 1e-8 leaves room for rounding
    # amplified by 1/(1 - beta) = 40.
    sol = solve_bus(BUS)
    V = hotz_miller_values(sol.ccp, BUS.flow_utility(), BUS.transitions(), discount=BUS.discount)
    np.testing.assert_allclose(V, sol.value, rtol=0, atol=1e-8)


def test_inversion_equals_value_function_three_choices_no_anchor() -> None:
    # Same identity on a model with no renewal or terminal choice (our inventory scenario).
    sol = INVENTORY.solve()
    Z, names = INVENTORY.design()
    theta = np.array([INVENTORY.truth[k] for k in names])
    V = hotz_miller_values(sol.ccp, Z @ theta, INVENTORY.transitions(), discount=INVENTORY.discount)
    np.testing.assert_allclose(V, sol.value, rtol=0, atol=1e-8)



def test_each_factorisation_keeps_its_own_values() -> None:
    # PolicySystem refills one matrix object per factor() call; an earlier LU must still
    # solve its own system (checked against a dense solve of I - beta F^P, numpy.linalg).
    from scipy import sparse

    from orthoccp.discrete._inversion import PolicySystem

    mats = tuple(sparse.csr_matrix(m) for m in BUS.transitions())
    system = PolicySystem(mats, BUS.discount)
    rng = np.random.default_rng(3)
    P1, P2 = (rng.dirichlet([1.0, 1.0], size=BUS.n_states) for _ in range(2))
    b = rng.normal(size=BUS.n_states)
    lu1 = system.factor(P1)
    system.factor(P2)
    A1 = np.eye(BUS.n_states) - BUS.discount * sum(
        P1[:, [j]] * mats[j].toarray() for j in range(2))
    np.testing.assert_allclose(lu1.solve(b), np.linalg.solve(A1, b), rtol=1e-10, atol=1e-10)

def test_policy_step_has_fixed_point_at_model_ccps() -> None:
    # Aguirregabiria & Mira (2002, Prop. 1): Lambda(u + beta F W(P)) = P at the solution.
    sol = INVENTORY.solve()
    Z, names = INVENTORY.design()
    theta = np.array([INVENTORY.truth[k] for k in names])
    mats = tuple(INVENTORY.transitions())
    inv = inversion_terms(sol.ccp, Z, [np.asarray(m) for m in mats], INVENTORY.discount)
    v = inv.Zt @ theta + inv.et
    P = np.exp(v - v.max(axis=1, keepdims=True))
    P /= P.sum(axis=1, keepdims=True)
    np.testing.assert_allclose(P, sol.ccp, rtol=0, atol=1e-10)


# --------------------------------------------------------------------------- NPL = MLE
def test_npl_fixed_point_is_the_nfxp_mle(bus_frame: pd.DataFrame, bus_panel: oc.Panel) -> None:
    # Aguirregabiria & Mira (2002, Prop. 3): the NPL fixed point is the MLE given the
    # transitions. NFXP stops at |grad l / N| < 1e-9, so its distance to the exact maximiser
    # is at most ||(H/N)^{-1}|| * 1e-9 * sqrt(p); NPL stops at a CCP change of 1e-10.
    nf = oc.reference.nfxp_estimate(
        bus_frame, state="mileage", choice="action", unit="bus", period="month",
        choices=("keep", "replace"), anchor="replace", utility=BUS.utility_spec(),
        discount=BUS.discount, transitions="increments", n_states=BUS.n_states)
    res = _bus_npl(bus_panel)
    assert res.converged and res.last_change < 1e-10
    theta = res.params[list(nf.params.index)].to_numpy()
    H = nf.problem.evaluate(theta).hessian / nf.n_obs
    bound = np.linalg.norm(np.linalg.inv(H), 2) * 1e-9 * np.sqrt(2) * 10
    np.testing.assert_allclose(theta, nf.params.to_numpy(), rtol=0, atol=bound)
    # The full-likelihood score vanishes at the NPL estimate (to the NFXP tolerance).
    assert np.max(np.abs(nf.problem.gradient(theta) / nf.n_obs)) < 1e-9
    assert res.loglik == pytest.approx(nf.loglik, rel=1e-10)


def test_npl_fixed_point_does_not_depend_on_the_start(bus_panel: oc.Panel) -> None:
    # The NPL fixed point is a property of the data (Aguirregabiria & Mira 2002, Prop. 3), so
    # a far start (and the one-Newton-step inner iterations that follow the first) must reach
    # the same estimate; both stop at a CCP change of 1e-10, which moves theta by ~1e-8 here.
    base = _bus_npl(bus_panel)
    far = _bus_npl(bus_panel, start={"RC": 2.0, "theta11": 0.5})
    assert far.converged and far.last_change < 1e-10
    np.testing.assert_allclose(far.params.to_numpy(), base.params.to_numpy(), rtol=0, atol=1e-7)


def test_npl_out_of_iterations_returns_the_last_policy_steps_maximiser(bus_panel: oc.Panel) -> None:
    # NPL stopped after K iterations is, by definition, K pseudo-likelihood steps from the
    # same start (Aguirregabiria & Mira 2002): each step's estimate maximises Q on its CCPs.
    # The truncated inner loop must not leave the last one a single Newton step short.
    with pytest.warns(oc.OrthoCCPWarning, match="NPL did not converge in 2 iterations"):
        npl = _bus_npl(bus_panel, max_iterations=2)
    pml = _bus_npl(bus_panel, estimator="pml", steps=2)
    assert not npl.converged
    np.testing.assert_allclose(npl.params.to_numpy(), pml.params.to_numpy(), rtol=1e-9)
    np.testing.assert_allclose(npl.std_errors.to_numpy(), pml.std_errors.to_numpy(), rtol=1e-6)


def test_pseudo_scores_equal_full_likelihood_scores(bus_panel: oc.Panel) -> None:
    # Zero-Jacobian property (Aguirregabiria & Mira 2002, Prop. 2): at the fixed point each
    # observation's pseudo-score equals its full-likelihood score, computed by the reference
    # through the implicit function theorem.
    res = _bus_npl(bus_panel)
    prob = build_problem(bus_panel, utility=BUS.utility_spec(), discount=BUS.discount,
                         n_states=BUS.n_states, transitions="increments",
                         reset_choices=["replace"])
    ref = NFXPProblem(design=prob.design, transitions=prob.transitions.dense(),
                      discount=BUS.discount, counts=prob.counts, parameters=prob.parameters,
                      choices=prob.choices)
    ev = ref.evaluate(res.params.to_numpy())
    I_full = ref.opg(ev)
    # The pseudo information is sum_s n_s sum_j P_j g_j g_j' with the same g.
    n_s = prob.counts.sum(axis=1)
    P = ev.solution.ccp
    I_expected = np.einsum("s,sj,sja,sjb->ab", n_s, P, ev.cell_scores, ev.cell_scores)
    np.testing.assert_allclose(res.information, I_expected, rtol=1e-7)
    assert np.all(np.isfinite(I_full))


def test_npl_covariance_matches_mle_information_without_transition_noise(
    bus_panel: oc.Panel,
) -> None:
    # Without the transition step and clustering, the NPL sandwich uses the MLE's scores and
    # its expected information: by the information equality (Rust 1987) the standard errors
    # agree with the inverse observed information up to sampling noise, O(N^{-1/2}) relative;
    # 50 units -> 25% is about two of those.
    res = _bus_npl(bus_panel, cov="heteroskedastic", transition_noise=False)
    se_info = np.sqrt(np.diag(np.linalg.inv(res.information)))
    np.testing.assert_allclose(res.std_errors.to_numpy(), se_info, rtol=0.25)


# --------------------------------------------------------------------------- discount 0
def test_static_logit_matches_greene_and_statsmodels() -> None:
    # Greene, Econometric Analysis, logit on Spector & Mazzeo (1980): const -13.021,
    # GPA 2.826, TUCE 0.095, PSI 2.379 (3 decimals published); statsmodels Logit MLE and
    # HC0 robust standard errors to 1e-6 (both Newton to 1e-11 and 1e-8 on this concave
    # problem).
    d = sm.datasets.spector.load_pandas().data
    df = d.assign(unit=np.arange(len(d)), period=0, grade=d["GRADE"].astype(int))
    panel = oc.Panel(df, unit="unit", period="period", choice="grade", states=["GPA", "TUCE", "PSI"])
    res = estimate_discrete(panel, discount=0.0, estimator="pml", cov="heteroskedastic", small_sample=False,
                            utility={0: {}, 1: {"const": "1", "GPA": "GPA", "TUCE": "TUCE", "PSI": "PSI"}})
    published = {"const": -13.021, "GPA": 2.826, "TUCE": 0.095, "PSI": 2.379}
    for k, v in published.items():
        assert res.params[k] == pytest.approx(v, abs=5e-4)
    X = sm.add_constant(d[["GPA", "TUCE", "PSI"]]).rename(columns={"const": "const"})
    fit = sm.Logit(d["GRADE"], X).fit(disp=0, cov_type="HC0", tol=1e-12)
    np.testing.assert_allclose(res.params[X.columns].to_numpy(), fit.params.to_numpy(), atol=1e-6)
    np.testing.assert_allclose(res.std_errors[X.columns].to_numpy(), fit.bse.to_numpy(), rtol=1e-5)


def test_static_multinomial_matches_statsmodels_mnlogit() -> None:
    # statsmodels MNLogit on its anes96 data (944 voters, 7 party identifications): MLE to
    # 1e-5 and HC0 standard errors to 1e-4 relative (Newton tolerances of both fits).
    d = sm.datasets.anes96.load_pandas().data
    cols = ["logpopul", "selfLR", "age", "educ", "income"]
    df = d.assign(unit=np.arange(len(d)), period=0, pid=d["PID"].astype(int))
    panel = oc.Panel(df, unit="unit", period="period", choice="pid", states=cols)
    utility = {0: {}, **{j: {f"const_{j}": "1", **{f"{c}_{j}": c for c in cols}} for j in range(1, 7)}}
    res = estimate_discrete(panel, discount=0.0, estimator="pml", cov="heteroskedastic", small_sample=False,
                            utility=utility)
    fit = sm.MNLogit(d["PID"], sm.add_constant(d[cols])).fit(
        disp=0, method="newton", maxiter=100, cov_type="HC0")
    ours = np.array([[res.params[f"{c}_{j}"] for j in range(1, 7)] for c in ["const", *cols]])
    se = np.array([[res.std_errors[f"{c}_{j}"] for j in range(1, 7)] for c in ["const", *cols]])
    np.testing.assert_allclose(ours, fit.params.to_numpy(), atol=1e-5)
    np.testing.assert_allclose(se, fit.bse.to_numpy(), rtol=1e-4)


# --------------------------------------------------------------------------- transitions
def _weighted_frequency(prob, unit: int, h: float, alpha: float) -> np.ndarray:
    """Cell frequencies (with smoothing alpha toward the pooled distribution) when unit's
    transitions carry weight 1 + h: the estimator's definition, differentiated in h."""
    o = prob.transitions._obs
    w = np.where(o["unit"] == unit, 1.0 + h, 1.0)
    S, J = prob.counts.shape
    F = np.zeros((J, S, S))
    for j in range(J):
        sel = o["choice"] == j
        C = np.zeros((S, S))
        np.add.at(C, (o["state"][sel], o["next_state"][sel]), w[sel])
        q = C.sum(axis=0) / C.sum()
        n = C.sum(axis=1)
        fill = alpha if alpha > 0 else (n == 0).astype(float)
        F[j] = (C + np.multiply.outer(np.broadcast_to(fill, n.shape), q)) / (n + fill)[:, None]
    return F


@pytest.mark.parametrize("alpha", [0.0, 2.0])
def test_transition_correction_matches_finite_differences(
    inventory_panel: oc.Panel, alpha: float
) -> None:
    # Two-step estimation (Newey & McFadden 1994, Thm 6.1): unit i's transition term is
    # dS/dF . D_i with D_i = d F_hat / d (weight of unit i). Check the adjoint formula
    # against central differences of -sum_s n_s sum_j P_j g_j ln P_j(F_hat(h)) solved by the
    # reference Bellman solver (step 1e-5: truncation O(h^2) ~ 1e-10, rounding ~ 1e-9).
    res = estimate_discrete(inventory_panel, utility=INVENTORY.utility_spec(),
                            discount=INVENTORY.discount, n_states=INVENTORY.n_states,
                            transitions="frequency", smoothing=alpha)
    prob = build_problem(inventory_panel, utility=INVENTORY.utility_spec(),
                         discount=INVENTORY.discount, n_states=INVENTORY.n_states,
                         transitions="frequency", smoothing=alpha)
    np.testing.assert_allclose(prob.transitions.dense(), _weighted_frequency(prob, 0, 0.0, alpha),
                               atol=1e-12)
    theta = res.params.to_numpy()
    u = prob.design @ theta
    ref = NFXPProblem(design=prob.design, transitions=prob.transitions.dense(),
                      discount=INVENTORY.discount, counts=prob.counts,
                      parameters=prob.parameters, choices=prob.choices)
    ev = ref.evaluate(theta)
    w = prob.counts.sum(axis=1)[:, None, None] * ev.solution.ccp[:, :, None] * ev.cell_scores
    h = 1e-5
    for unit in (0, 5, 17):
        lp = [solve_bellman(u, _weighted_frequency(prob, unit, s * h, alpha),
                            INVENTORY.discount).log_ccp for s in (1, -1)]
        fd = -np.einsum("sjk,sj->k", w, (lp[0] - lp[1]) / (2 * h))
        ours = res.information @ res.influence_parts["transitions"][unit]
        np.testing.assert_allclose(ours, fd, rtol=1e-5, atol=1e-7 * np.abs(fd).max())


def test_pml_transition_correction_matches_finite_differences(inventory_panel: oc.Panel) -> None:
    # One pseudo-likelihood step from cell-frequency CCPs P0: the estimate solves
    # sum_s n_s sum_j (m_sj - Lambda_j(v(theta; P0, F))) g_j = 0 with P0 held fixed, so unit
    # i's transition term is -sum_s n_s sum_j Lambda_j g_j d ln Lambda_j(v(theta; P0, F_hat(h)))/dh
    # (Newey & McFadden 1994, Thm 6.1), differentiated here through the inversion at P0 by
    # central differences (step 1e-5; truncation O(h^2) ~ 1e-10). Away from NPL's fixed point
    # Lambda differs from P0, so this checks that the adjoint uses the inversion's CCPs.
    from scipy import sparse

    from orthoccp.discrete._estimate import _initial_ccp
    from orthoccp.discrete._pseudo import cell_logit

    common = dict(utility=INVENTORY.utility_spec(), discount=INVENTORY.discount,
                  n_states=INVENTORY.n_states, transitions="frequency")
    res = estimate_discrete(inventory_panel, estimator="pml", **common)
    prob = build_problem(inventory_panel, **common)
    P0 = _initial_ccp(prob, "frequency", 1e-4, 3, 0)[0]
    theta = res.params.to_numpy()
    inv = inversion_terms(P0, prob.design, prob.mats, prob.discount)
    Lam, _ = cell_logit(inv.Zt, inv.et, theta)
    assert np.max(np.abs(Lam - P0)) > 1e-2  # not at a fixed point: the two CCPs differ
    g = inv.Zt - np.einsum("sj,sjk->sk", Lam, inv.Zt)[:, None, :]
    w = prob.counts.sum(axis=1)[:, None, None] * Lam[:, :, None] * g
    h = 1e-5
    for unit in (0, 5, 17):
        lp = []
        for sign in (1, -1):
            F = _weighted_frequency(prob, unit, sign * h, 0.0)
            t = inversion_terms(P0, prob.design, [sparse.csr_matrix(m) for m in F],
                                prob.discount)
            lp.append(cell_logit(t.Zt, t.et, theta)[1])
        fd = -np.einsum("sjk,sj->k", w, (lp[0] - lp[1]) / (2 * h))
        ours = res.information @ res.influence_parts["transitions"][unit]
        np.testing.assert_allclose(ours, fd, rtol=1e-5, atol=1e-7 * np.abs(fd).max())


def test_increment_transitions_are_rusts_first_step(bus_frame: pd.DataFrame) -> None:
    # Rust (1987), first step: the increment pmf is the sample frequency of x' - b (b = x after
    # keep, 0 after replace) over the transitions that cannot be censored at the last state,
    # and F_j(s' | s) puts pmf[k] on min(b_j(s) + k, S - 1). Computed here by hand; the
    # full-solution reference's first step (orthoccp.reference.estimate_transitions, which
    # the discrete-state estimators' code now serves) must return the same dense matrices.
    from orthoccp.reference import estimate_transitions

    df = bus_frame
    S = 175
    s = df["mileage"].to_numpy()
    a = (df["action"] == "replace").to_numpy().astype(int)
    nxt = np.r_[s[1:], -1]
    linked = np.r_[df["bus"].to_numpy()[1:] == df["bus"].to_numpy()[:-1], False]
    rows = np.flatnonzero(linked)
    base = np.where(a[rows] == 1, 0, s[rows])
    inc = nxt[rows] - base
    K = int(inc.max())
    counted = inc[base + K <= S - 1]
    pmf = np.bincount(counted, minlength=K + 1) / counted.size
    F = np.zeros((2, S, S))
    for j, b in enumerate((np.arange(S), np.zeros(S, dtype=int))):
        for k, pk in enumerate(pmf):
            np.add.at(F[j], (np.arange(S), np.minimum(b + k, S - 1)), pk)
    ours = estimate_transition_matrices(s[rows], a[rows], nxt[rows], n_states=S,
                                        choices=("keep", "replace"), method="increments",
                                        reset_choices=["replace"])
    ref = estimate_transitions(s[rows], a[rows], nxt[rows], n_states=S,
                               choices=("keep", "replace"), method="increments", anchor=1)
    for got in (ours.increments, ref.increments):
        np.testing.assert_allclose(got, pmf, atol=1e-15)
    for got in (ours.dense(), ref.matrices):
        np.testing.assert_allclose(got, F, atol=1e-15)
    assert ours.n_transitions == ref.n_transitions == counted.size



def test_a_forgotten_reset_choice_is_named(bus_panel: oc.Panel) -> None:
    # Without reset_choices a replacement reads as a huge negative increment; the error names
    # the choice and the option instead of only saying that nothing could be counted.
    with pytest.raises(oc.InputError, match=r"After choice 'replace' .* reset_choices=\['replace'\]"):
        estimate_discrete(bus_panel, utility=BUS.utility_spec(), discount=0.975,
                          n_states=BUS.n_states, transitions="increments")


def test_mostly_censored_increments_warn_with_the_count() -> None:
    # 20 states; choice 1 restarts at 0 but is not declared a reset, so its increments
    # (-4, -3) make the range -4..1 and censor every transition from states 0..3.
    state = np.array([0, 1, 2, 3, 0, 1, 2, 3, 4, 3, 4, 5])
    choice = np.array([0] * 8 + [1, 1, 0, 0])
    nxt = state + np.where(choice == 1, -state, 1)
    with pytest.warns(oc.OrthoCCPWarning, match="only 3 of 12 observed transitions") as rec:
        tm = estimate_transition_matrices(state, choice, nxt, n_states=20, choices=(0, 1),
                                          method="increments")
    assert "reset_choices=[1]" in str(rec[0].message)
    assert tm.n_transitions == 3
    # declared, the reset leaves every transition counted and the warning away
    tm = estimate_transition_matrices(state, choice, nxt, n_states=20, choices=(0, 1),
                                      method="increments", reset_choices=[1])
    assert tm.n_transitions == 12

# --------------------------------------------------------------------------- forward simulation
def test_forward_simulated_values_converge_to_inversion(inventory_panel: oc.Panel) -> None:
    # Hotz, Miller, Sanders & Smith (1994): the simulated continuation is an unbiased
    # average of paths, so its error shrinks like 1/sqrt(paths) (up to the truncation
    # beta^T <= 1e-6). Checked per cell against the simulation's own standard error, and
    # the error at 16x the paths must be about 4x smaller (at most half).
    prob = build_problem(inventory_panel, utility=INVENTORY.utility_spec(),
                         discount=INVENTORY.discount, n_states=INVENTORY.n_states,
                         transitions="increments", base=INVENTORY.bases())
    P = INVENTORY.solve().ccp
    inv = inversion_terms(P, prob.design, prob.mats, prob.discount)
    states = np.arange(prob.design.shape[0])
    theta = np.array([INVENTORY.truth[k] for k in prob.parameters])
    errors = []
    for M in (50, 800):
        sim = simulate_continuation(P, prob.design, prob.mats, prob.discount, states,
                                    n_paths=M, horizon=270, seed=3)
        v_sim = sim.Zt @ theta + sim.et
        v_inv = inv.Zt @ theta + inv.et
        th1 = np.append(theta, 1.0)
        se = prob.discount * np.sqrt(np.einsum("a,sjab,b->sj", th1, sim.mean_cov, th1))
        z = np.abs(v_sim - v_inv) / se
        assert np.quantile(z, 0.95) < 3.0 and z.max() < 5.0
        errors.append(np.sqrt(np.mean((v_sim - v_inv) ** 2)))
    assert errors[1] < 0.5 * errors[0]


def test_forward_estimates_approach_inversion_estimates(inventory_panel: oc.Panel) -> None:
    # The forward-simulation estimate of the same one-step estimator approaches the
    # inversion's as paths grow; the difference stays within 4 simulation standard errors.
    common = dict(utility=INVENTORY.utility_spec(), discount=INVENTORY.discount,
                  n_states=INVENTORY.n_states, transitions="increments",
                  base=INVENTORY.bases(), estimator="pml")
    exact = estimate_discrete(inventory_panel, **common)
    gaps = []
    for M in (100, 1600):
        sim = estimate_discrete(inventory_panel, values="simulation", n_paths=M, seed=11, **common)
        sim_se = np.sqrt(sim.decomposition["simulation"] * sim.std_errors**2)
        gap = (sim.params - exact.params).abs()
        assert (gap <= 4 * sim_se).all()
        gaps.append(float(np.sqrt(np.mean((gap / exact.std_errors) ** 2))))
    assert gaps[1] < 0.5 * gaps[0]


def test_forward_draws_are_reproducible_and_common_across_theta(inventory_panel: oc.Panel) -> None:
    prob = build_problem(inventory_panel, utility=INVENTORY.utility_spec(),
                         discount=INVENTORY.discount, n_states=INVENTORY.n_states)
    P = INVENTORY.solve().ccp
    a = simulate_continuation(P, prob.design, prob.mats, prob.discount, np.arange(25),
                              n_paths=20, horizon=30, seed=5)
    b = simulate_continuation(P, prob.design, prob.mats, prob.discount, np.arange(25),
                              n_paths=20, horizon=30, seed=5)
    np.testing.assert_array_equal(a.Zt, b.Zt)
    np.testing.assert_array_equal(a.et, b.et)


# --------------------------------------------------------------------------- three choices
def test_npl_recovers_truth_without_finite_dependence() -> None:
    # Large sample of our inventory scenario: every estimate within 3 SE of the truth
    # (a 3-SE band misses with probability 0.3% per parameter when the SEs are right).
    df = simulate_inventory(units=3000, periods=20, seed=2)
    panel = oc.Panel(df, unit="shop", period="period", choice="order", states=["stock"])
    res = estimate_discrete(panel, utility=INVENTORY.utility_spec(), discount=INVENTORY.discount,
                            n_states=INVENTORY.n_states, transitions="increments",
                            base=INVENTORY.bases())
    truth = pd.Series(INVENTORY.truth)[res.params.index]
    assert res.converged
    assert ((res.params - truth).abs() <= 3 * res.std_errors).all()


# --------------------------------------------------------------------------- results object
def test_results_object_views(bus_panel: oc.Panel) -> None:
    res = _bus_npl(bus_panel)
    assert isinstance(res, oc.Results)
    text = res.summary()
    assert "NPL iterations" in text and "no renewal or terminal choice needed" in text
    out = json.loads(res.to_json())
    assert out["details"]["kind"] == "discrete"
    assert out["details"]["estimator"] == "npl" and out["details"]["converged"] is True
    # the discrete estimator does not cross-fit: no placeholder folds or learner
    for absent in ("folds", "learner", "scheme", "splits"):
        assert absent not in out["details"]
        with pytest.raises(AttributeError, match=f"has no attribute '{absent}'.*DiscreteDetails"):
            getattr(res, absent)
    assert [p["name"] for p in out["params"]] == ["theta11", "RC"]
    assert res.conf_int().shape == (2, 2)
    assert res.influence.shape == (50, 2)
    # the default small-sample factor G/(G-1), G = 50 buses (the shared option's default)
    np.testing.assert_allclose(res.cov.to_numpy(), 50 / 49 * res.influence.T @ res.influence)


def test_unit_relabelling_and_row_order_do_not_change_estimates(bus_frame: pd.DataFrame) -> None:
    base = _bus_npl(oc.Panel(bus_frame, unit="bus", period="month", choice="action",
                             states=["mileage"]))
    shuffled = bus_frame.sample(frac=1.0, random_state=0).assign(bus=lambda d: 1000 - d["bus"])
    other = _bus_npl(oc.Panel(shuffled, unit="bus", period="month", choice="action",
                              states=["mileage"]))
    np.testing.assert_allclose(other.params, base.params, rtol=1e-12)
    np.testing.assert_allclose(other.std_errors, base.std_errors, rtol=1e-10)


# --------------------------------------------------------------------------- anchor check
def test_anchor_check_warns_on_the_bus_design(bus_frame: pd.DataFrame, bus_panel: oc.Panel) -> None:
    # Exact CCPs of the Su & Judd design: right after a replacement P_R is of order 1e-5.
    ccp = bus_panel.frame[["p_keep", "p_replace"]].to_numpy()
    chk = check_anchor_probability(bus_panel, ccp, anchor="replace")
    assert chk.n_rows == int((bus_frame["action"] == "replace").sum()) - int(
        ((bus_frame["action"] == "replace") & (bus_frame["month"] == 119)).sum())
    assert chk.median < 1e-3 and chk.warning is not None and "renewal-robust" in chk.warning
    assert any("Anchor probability" in r for r in chk.readings())


def test_anchor_check_silent_when_anchor_is_common(bus_panel: oc.Panel) -> None:
    ccp = np.tile([0.7, 0.3], (bus_panel.n_rows, 1))
    chk = check_anchor_probability(bus_panel, ccp, anchor="replace", min_expected=1.0)
    assert chk.warning is None and chk.median == pytest.approx(0.3)


# --------------------------------------------------------------------------- states, inputs
def test_state_space_and_binning() -> None:
    df = pd.DataFrame({"id": np.repeat(np.arange(10), 5), "t": np.tile(np.arange(5), 10)})
    rng = np.random.default_rng(0)
    df["x"] = rng.normal(size=50)
    df["a"] = rng.integers(0, 2, size=50)
    binned, edges = bin_states(df, ["x"], bins=4)
    assert binned["x_bin"].nunique() == 4 and edges["x"].size == 5
    assert (binned.groupby("x_bin")["x"].mean() == binned.groupby("x_bin")["x_mid"].first()).all()
    panel = oc.Panel(binned, unit="id", period="t", choice="a", states=["x_bin"])
    sp = state_space(panel)
    assert sp.n_states == 4 and np.array_equal(sp.codes, panel.frame["x_bin"].to_numpy())


def _bad_calls(panel: oc.Panel) -> list:
    u = BUS.utility_spec()
    base = dict(utility=u, discount=0.975, n_states=175)
    return [
        (dict(base, estimator="full"), "estimator must be"),
        (dict(base, values="simulation"), "needs estimator='pml'"),
        (dict(base, discount=1.0), "discount must be"),
        (dict(base, transitions="kernel"), "transitions must be"),
        (dict(base, smoothing=-1.0), "smoothing must be"),
        (dict(base, n_states=10), "integer codes 0..9"),
        (dict(base, utility={"keep": {"c": "1"}, "replace": {"c": "1"}}), "not all identified"),
        (dict(base, utility={**u, "stop": {"c": "1"}}), "utility choice 'stop' is not among the choices observed"),
        (dict(base, utility={"keep": u["keep"]}), r"observed choice\(s\) 'replace' \(\d+ rows\).*not declared"),
        (dict(base, initial_ccp=np.ones((175, 2))), "initial_ccp must be"),
        (dict(base, transitions="increments", increment_range=(1, 0)), "smallest <= largest"),
    ]


def test_bad_inputs_raise_clear_errors(bus_panel: oc.Panel) -> None:
    for kwargs, match in _bad_calls(bus_panel):
        with pytest.raises(oc.InputError, match=match):
            estimate_discrete(bus_panel, **kwargs)


def test_one_unit_is_refused_for_clustered_errors() -> None:
    # One cluster: the score sums to zero at the estimate, so the clustered sandwich is zero
    # up to rounding (it used to report standard errors near 1e-14); the row sandwich is kept.
    df = simulate_inventory(units=1, periods=200, seed=7)
    panel = oc.Panel(df, unit="shop", period="period", choice="order", states=["stock"])
    common = dict(utility=INVENTORY.utility_spec(), discount=INVENTORY.discount,
                  n_states=INVENTORY.n_states)
    with pytest.raises(oc.InputError, match="at least two clusters"):
        estimate_discrete(panel, **common)
    res = estimate_discrete(panel, cov="heteroskedastic", **common)
    assert (res.std_errors > 0.01).all()
    with pytest.raises(oc.InputError, match="cov 'robust' is unknown"):
        estimate_discrete(panel, cov="robust", **common)


def test_regressor_that_varies_within_a_state_is_refused(inventory_panel: oc.Panel) -> None:
    frame = inventory_panel.frame.assign(noise=np.arange(inventory_panel.n_rows, dtype=float))
    panel = oc.Panel(frame, unit="shop", period="period", choice="order", states=["stock"])
    with pytest.raises(oc.InputError, match="varies within a state"):
        estimate_discrete(panel, utility={"large": {"c": "1"}, "small": {"n": "noise"}, "none": {}},
                          discount=0.9)


@pytest.mark.parametrize("name", ["orthoccp.discrete._states", "orthoccp.discrete._inversion",
                                  "orthoccp.discrete._transitions", "orthoccp.anchor",
                                  "orthoccp.discrete._scenario", "orthoccp.discrete._estimate"])
def test_docstring_examples(name: str) -> None:
    result = doctest.testmod(importlib.import_module(name), optionflags=doctest.NORMALIZE_WHITESPACE)
    assert result.failed == 0


def test_choices_order_of_scenario_matches_panel(inventory_panel: oc.Panel) -> None:
    assert tuple(inventory_panel.choices) == CHOICES


# --------------------------------------------------------------------------- fast paths
def test_binary_pseudo_likelihood_matches_statsmodels_grouped_glm(bus_panel: oc.Panel) -> None:
    # One pseudo-likelihood step on the bus design is a grouped binary logit with offsets:
    # statsmodels' GLM (Binomial family, counts as endog, the inversion's offset) fitted by
    # IRLS to 1e-12 gives the same maximiser to 1e-7 relative, whichever start Newton uses.
    from orthoccp.discrete._pseudo import grouped_logit_start, maximise_pseudo

    prob = build_problem(bus_panel, utility=BUS.utility_spec(), discount=BUS.discount,
                         n_states=BUS.n_states, transitions="increments",
                         reset_choices=["replace"])
    P = prob.counts / np.maximum(prob.counts.sum(axis=1, keepdims=True), 1.0)
    P = np.clip(np.where(prob.counts.sum(axis=1, keepdims=True) > 0, P, 0.5), 1e-4, 1 - 1e-4)
    P /= P.sum(axis=1, keepdims=True)
    inv = inversion_terms(P, prob.design, prob.mats, prob.discount)
    seen = prob.counts.sum(axis=1) > 0
    X = (inv.Zt[seen, 1] - inv.Zt[seen, 0])
    off = inv.et[seen, 1] - inv.et[seen, 0]
    endog = np.column_stack([prob.counts[seen, 1], prob.counts[seen, 0]])
    glm = sm.GLM(endog, X, family=sm.families.Binomial(), offset=off).fit(tol=1e-12)
    for start in (np.zeros(2), np.array([5.0, 20.0]), grouped_logit_start(inv.Zt, inv.et, prob.counts)):
        fit = maximise_pseudo(inv.Zt, inv.et, prob.counts, start, names=prob.parameters)
        np.testing.assert_allclose(fit.theta, glm.params, rtol=1e-7)
    # The three-choice path gives the same maximiser on the same cells (a choice with no
    # probability mass adds nothing to Q).
    Z3 = np.concatenate([inv.Zt, inv.Zt[:, :1]], axis=1)
    e3 = np.concatenate([inv.et, np.full((inv.et.shape[0], 1), -50.0)], axis=1)
    c3 = np.concatenate([prob.counts, np.zeros((prob.counts.shape[0], 1))], axis=1)
    fit3 = maximise_pseudo(Z3, e3, c3, np.zeros(2), names=prob.parameters)
    np.testing.assert_allclose(fit3.theta, glm.params, rtol=1e-7)
    # NPL's truncated inner loop: max_steps=1 takes exactly one step-halved Newton step (the
    # pseudo log-likelihood does not fall; Q is concave) and repeating it reaches the same
    # maximiser as the untruncated solve (statsmodels' again).
    from orthoccp.discrete._pseudo import _Binary, newton_pseudo

    q = _Binary(inv.Zt[seen], inv.et[seen], prob.counts[seen])
    theta = np.array([5.0, 20.0])
    path = [q.loglik(theta)[0]]
    for _ in range(30):
        theta, n_steps = newton_pseudo(inv.Zt, inv.et, prob.counts, theta,
                                       names=prob.parameters, max_steps=1)
        assert n_steps == 1
        path.append(q.loglik(theta)[0])
    assert np.all(np.diff(path) >= -1e-9 * abs(path[0]))
    np.testing.assert_allclose(theta, glm.params, rtol=1e-7)


def test_group_sums_equal_numpy_add_at() -> None:
    # numpy's unbuffered np.add.at is the reference: same sums to the last bit.
    from orthoccp._arrays import group_sums

    rng = np.random.default_rng(3)
    codes = rng.integers(0, 40, size=5000)
    values = rng.normal(size=(5000, 3)) * 10.0 ** rng.uniform(-6, 6, size=(5000, 1))
    expected = np.zeros((45, 3))
    np.add.at(expected, codes, values)
    assert np.array_equal(group_sums(codes, values, 45), expected)
    assert np.array_equal(group_sums(codes, values[:, 0], 45), expected[:, 0])


def test_label_index_equals_pandas_and_is_a_fresh_object() -> None:
    # Reference: pd.Index built directly; the cached template must not change dtypes
    # ((1, 2) and (1.0, 2.0) compare equal as tuples) nor share a renamable object.
    from orthoccp._arrays import label_index

    for labels in (("theta11", "RC"), (1, 2), (1.0, 2.0), (True, False)):
        pd.testing.assert_index_equal(label_index(labels, "parameter"),
                                      pd.Index(list(labels), name="parameter"), exact=True)
    a = label_index(("x", "y"), "parameter")
    a.name = "renamed"
    assert label_index(("x", "y"), "parameter").name == "parameter"
