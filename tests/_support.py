"""Helpers shared by the tests (imported as a plain module)."""

from __future__ import annotations

import orthoccp as oc


def panel_and_model(sim):  # type: ignore[no-untyped-def]
    """Panel and Model for a simulation, plus the simulator's column order -> panel's order."""
    panel = oc.Panel(sim.data, unit=sim.unit, period=sim.period, choice=sim.choice, states=list(sim.states))
    model = oc.Model(anchor=sim.anchor, kind=sim.kind, discount=sim.discount, utility=sim.utility)
    order = [list(sim.choices).index(c) for c in panel.choices]
    return panel, model, order


def truth_nuisances(sim, panel, model, order):  # type: ignore[no-untyped-def]
    bound = model.bind(panel)
    return oc.nuisances_from_truth(bound, sim.ccp[:, order], sim.continuation[:, order])
