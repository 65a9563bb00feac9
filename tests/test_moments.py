"""Specification of orthoccp.moments: Neyman orthogonality of the corrected moment.

METHOD §7 check 3 (Chernozhukov, Escanciano, Ichimura, Newey & Robins 2022): perturb each
nuisance by t * delta around the exact solution; the central-difference slope of the mean
corrected moment psi at theta0 is zero up to sampling noise, while that of the plug-in moment
m is not. Sampling noise is judged by the unit-clustered standard error of the slope (per-row
slopes are exact derivatives of a moment that is linear or smooth in t).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.special import expit, logit

import orthoccp as oc
from orthoccp.estimate import account_rows
from orthoccp.moments import build_moment_system

from _support import panel_and_model

H = 1e-4


def _exact_pieces(sim, t: float, delta_grid: np.ndarray):  # type: ignore[no-untyped-def]
    """CCPs and continuation expectations when logit P_R is shifted by t * delta on the grid."""
    sol = sim.solution
    R = sol.model.anchor
    P = sol.ccp.copy()
    pr = expit(logit(P[:, :, R]) + t * delta_grid)
    P *= ((1 - pr) / (1 - P[:, :, R]))[:, :, None]
    P[:, :, R] = pr
    log_pr = np.log(pr)
    mu = np.full(P.shape, np.nan)
    for j, tr in enumerate(sol.model.transitions):
        if tr is not None:
            mu[:, :, j] = tr.expect(log_pr)
    u, s = sim.unit_index, sim.state_index
    return P[u, s], mu[u, s]


def _slopes(sim, perturb):  # type: ignore[no-untyped-def]
    """Mean and clustered s.e. of the per-row slopes of m and psi at theta0."""
    panel, model, order = panel_and_model(sim)
    bound = model.bind(panel)
    rows, corrected, _ = account_rows(bound)
    theta0 = np.array([sim.truth[k] for k in bound.parameters])
    out = {}
    per = {}
    for sign in (+1, -1):
        P, mu = perturb(sign * H)
        nu = oc.Nuisances(ccp=P[:, order], mu=mu[:, order][:, :, None])
        comps = build_moment_system(bound, nu, rows, corrected).components(theta0, debias=True)
        per[sign] = {"m": comps["m"], "psi": sum(comps.values())}
    units = panel.unit_codes[rows]
    for key in ("m", "psi"):
        d = (per[1][key] - per[-1][key]) / (2 * H)
        sums = np.zeros((units.max() + 1, d.shape[1]))
        np.add.at(sums, units, d)
        n = d.shape[0]
        out[key] = (d.mean(axis=0), np.sqrt((sums**2).sum(axis=0)) / n)
    return out


def _delta(sim) -> np.ndarray:  # type: ignore[no-untyped-def]
    n_units, n_states, _ = sim.solution.model.shape
    level = np.arange(n_states)[None, :]
    return np.sin(level / 3.0) + 0.5 * np.tanh(sim.covariates[:, :1]) + 0.0 * level


@pytest.mark.parametrize("name", ["ebike", "ebike3", "producers"])
def test_orthogonal_to_the_ccp(big_sims, name: str) -> None:  # type: ignore[no-untyped-def]
    """P perturbed on the logit scale; the continuation expectations follow it exactly."""
    sim = big_sims[name]
    delta = _delta(sim)
    s = _slopes(sim, lambda t: _exact_pieces(sim, t, delta))
    slope_m, se_m = s["m"]
    slope_psi, se_psi = s["psi"]
    # psi: zero within 4 clustered standard errors; m: clearly non-zero for some parameter.
    assert np.all(np.abs(slope_psi) < 4 * se_psi + 1e-12), (slope_psi, se_psi)
    assert np.max(np.abs(slope_m) / se_m) > 8, (slope_m, se_m)
    assert np.max(np.abs(slope_psi)) < 0.25 * np.max(np.abs(slope_m))


@pytest.mark.parametrize("name", ["ebike", "ebike3", "producers"])
def test_orthogonal_to_the_continuation_regressions(big_sims, name: str) -> None:  # type: ignore[no-untyped-def]
    """mu_j shifted by t * delta * (j + 1): a smooth, bounded, choice-specific direction."""
    sim = big_sims[name]
    P0, mu0 = _exact_pieces(sim, 0.0, _delta(sim))
    d_rows = _delta(sim)[sim.unit_index, sim.state_index]
    direction = d_rows[:, None] * np.arange(1, mu0.shape[1] + 1)[None, :]
    s = _slopes(sim, lambda t: (P0, mu0 + t * direction))
    slope_m, se_m = s["m"]
    slope_psi, se_psi = s["psi"]
    assert np.all(np.abs(slope_psi) < 4 * se_psi + 1e-12), (slope_psi, se_psi)
    assert np.max(np.abs(slope_m) / se_m) > 8, (slope_m, se_m)


def test_exact_nuisances_give_mean_zero_corrections(big_sims) -> None:  # type: ignore[no-untyped-def]
    """E[phi | x_t, a_t] = 0: at the truth the corrections average to zero (within 4 s.e.)."""
    sim = big_sims["ebike"]
    panel, model, order = panel_and_model(sim)
    bound = model.bind(panel)
    rows, corrected, _ = account_rows(bound)
    nu = oc.nuisances_from_truth(bound, sim.ccp[:, order], sim.continuation[:, order])
    system = build_moment_system(bound, nu, rows, corrected)
    theta0 = np.array([sim.truth[k] for k in bound.parameters])
    for part in system.corrections(theta0):
        units = system.units
        sums = np.zeros((units.max() + 1, part.shape[1]))
        np.add.at(sums, units, part)
        se = np.sqrt((sums**2).sum(axis=0)) / part.shape[0]
        assert np.all(np.abs(part.mean(axis=0)) < 4 * se)
