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
