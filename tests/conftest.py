"""Shared fixtures: simulated panels (invented scenarios, for checks of mechanics only)."""

from __future__ import annotations

import pytest

from orthoccp.simulate import simulate


@pytest.fixture(scope="session")
def small_ebike():  # type: ignore[no-untyped-def]
    return simulate("ebike", units=300, periods=8, seed=11)


@pytest.fixture(scope="session")
def big_sims():  # type: ignore[no-untyped-def]
    return {name: simulate(name, units=4000, periods=12, seed=5) for name in ("ebike", "ebike3", "producers")}


@pytest.fixture(scope="module")
def bus_frame():  # type: ignore[no-untyped-def]
    """Su & Judd (2012) bus design simulated by orthoccp.reference: 50 buses x 120 months."""
    from orthoccp.reference import simulate_bus

    return simulate_bus(buses=50, periods=120, seed=1000)


@pytest.fixture(scope="module")
def bus_panel(bus_frame):  # type: ignore[no-untyped-def]
    import orthoccp as oc

    return oc.Panel(bus_frame, unit="bus", period="month", choice="action", states=["mileage"])
