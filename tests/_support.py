"""Helpers shared by the tests (imported as a plain module)."""

from __future__ import annotations

import numpy as np

import orthoccp as oc


def panel_and_model(sim):  # type: ignore[no-untyped-def]
    """Panel and Model for a simulation, plus the simulator's column order -> panel's order."""
    panel = oc.Panel(sim.data, unit=sim.unit, period=sim.period, choice=sim.choice, states=list(sim.states))
    model = oc.Model(anchor=sim.anchor, kind=sim.kind, discount=sim.discount, utility=sim.utility)
    order = [list(sim.choices).index(c) for c in panel.choices]
    return panel, model, order


def truth_nuisances(sim, panel, model, order):  # type: ignore[no-untyped-def]
    """The simulator's exact nuisances in the panel's choice order (``order`` is implied)."""
    return sim.exact_nuisances(panel, model)



def dense(sim):  # type: ignore[no-untyped-def]
    """Dense per-choice transition matrices, each ``(N, S, S)`` (None for a terminal choice)."""
    return [None if tr is None else tr.matrix() for tr in sim.solution.model.transitions]


def expect(T: np.ndarray, f: np.ndarray) -> np.ndarray:
    """Dense ``E[f(x') | x]`` for every unit and state: ``T (N, S, S)``, ``f (N, S)``."""
    return np.einsum("nst,nt->ns", T, f)


def row_flow(sim) -> np.ndarray:  # type: ignore[no-untyped-def]
    """``z_j(x)'theta`` at every data row, built from the data columns."""
    flow = np.zeros((len(sim.data), len(sim.choices)))
    for j, label in enumerate(sim.choices):
        for param, column in sim.utility[label].items():
            regressor = 1.0 if column == "1" else sim.data[column].to_numpy(dtype=float)
            flow[:, j] += sim.truth[param] * regressor
    return flow


def assert_bellman_fixed_point(sim) -> None:  # type: ignore[no-untyped-def]
    """Rust (1987): V = ln sum_j exp(u_j + beta E[V' | x, j]) + gamma_E, with dense matrices."""
    from scipy.special import logsumexp

    from orthoccp.simulate import EULER_GAMMA

    sol = sim.solution
    assert sol.change < 1e-12
    v = sol.model.flow.copy()
    for j, T in enumerate(dense(sim)):
        if T is not None:
            v[:, :, j] += sim.discount * expect(T, sol.V)
    np.testing.assert_allclose(v, sol.values, rtol=0, atol=1e-10)
    np.testing.assert_allclose(logsumexp(v, axis=2) + EULER_GAMMA, sol.V, rtol=0, atol=1e-10)
