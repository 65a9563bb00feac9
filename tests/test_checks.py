"""Specification of orthoccp.checks: the warnings for assumptions the data can refute.

The reset test's null hypothesis holds in the simulator's renewal scenarios (the wear after
a swap is a fresh Binomial draw whose rate depends on the bike's covariates only), so a warning
there is a false alarm; a panel edited so that the wear after a swap keeps half the wear
before it violates the assumption. Invented data: mechanics and error rates only.
"""

from __future__ import annotations

import re
import warnings
from typing import Any

import pandas as pd
import numpy as np
import pytest

import orthoccp as oc
from orthoccp.checks import renewal_reset_test
from orthoccp.simulate import simulate


def _bind(sim: Any, frame: pd.DataFrame, persistent: list[str]) -> Any:
    panel = oc.Panel(frame, unit=sim.unit, period=sim.period, choice=sim.choice,
                     states=list(sim.states))
    model = oc.Model(anchor=sim.anchor, kind=sim.kind, discount=sim.discount,
                     utility=sim.utility, persistent=persistent)
    return model.bind(panel)


def _not_reset(sim: Any) -> pd.DataFrame:
    """The wear after a swap keeps half the wear before it (the renewal does not reset it)."""
    d = sim.data.copy()
    after_swap = d.groupby(sim.unit)[sim.choice].shift(1) == sim.anchor
    before = d.groupby(sim.unit)["wear"].shift(1)
    d.loc[after_swap, "wear"] = d.loc[after_swap, "wear"] + before[after_swap] // 2
    return d


def _false_alarms_and_power(scenario: str, seeds: range, units: int, periods: int) -> tuple[int, int, int]:
    alarms = power = runs = 0
    for seed in seeds:
        sim = simulate(scenario, units=units, periods=periods, seed=100 + seed)
        for persistent in (list(sim.persistent), []):
            test = renewal_reset_test(_bind(sim, sim.data, persistent))
            assert test is not None
            alarms += bool(test.flagged)
            runs += 1
        test = renewal_reset_test(_bind(sim, _not_reset(sim), list(sim.persistent)))
        power += bool(test is not None and test.flagged)
    return alarms, power, runs


@pytest.mark.parametrize("scenario", ["ebike", "ebike3"])
def test_reset_test_quiet_when_the_renewal_resets_and_warns_when_not(scenario: str) -> None:
    alarms, power, runs = _false_alarms_and_power(scenario, range(3), 1000, 12)
    assert alarms == 0 and runs == 6
    assert power == 3


@pytest.mark.slow
@pytest.mark.parametrize("scenario", ["ebike", "ebike3"])
def test_reset_test_error_rates_on_20_panels(scenario: str) -> None:
    """The measurement behind the module docstring: 0 false alarms in 40 runs, power 20/20."""
    alarms, power, runs = _false_alarms_and_power(scenario, range(20), 1000, 12)
    assert (alarms, power, runs) == (0, 20, 40)


def test_reset_warning_names_the_states_and_counts() -> None:
    sim = simulate("ebike", units=1000, periods=12, seed=100)
    frame = _not_reset(sim)
    panel = oc.Panel(frame, unit=sim.unit, period=sim.period, choice=sim.choice,
                     states=list(sim.states)[:6])
    model = oc.Model(anchor=sim.anchor, kind=sim.kind, discount=sim.discount, utility=sim.utility)
    with pytest.warns(oc.OrthoCCPWarning) as record:
        oc.estimate(panel, model, learner="logit", folds=3, scheme="plain")
    texts = [str(w.message) for w in record if "renewal the next state" in str(w.message)]
    assert len(texts) == 1
    assert re.search(r"in \d+ pairs of renewals of the same unit \(\d+ units\): next 'wear': "
                     r"p = [\d.e-]+, slope \+[\d.]+ s\.d\. per s\.d\. of 'wear'", texts[0]), texts[0]


def test_reset_test_needs_units_that_renew_twice() -> None:
    sim = simulate("ebike", units=60, periods=3, seed=1)
    assert renewal_reset_test(_bind(sim, sim.data, [])) is None
    terminal = simulate("producers", units=200, periods=6, seed=1)
    assert renewal_reset_test(_bind(terminal, terminal.data, [])) is None


def _persistent_model(sim: Any) -> oc.Model:
    return oc.Model(anchor=sim.anchor, kind=sim.kind, discount=sim.discount,
                    utility=sim.utility, persistent=["x0", "x1"])


def test_persistent_state_changing_away_from_renewals_does_not_warn() -> None:
    """An exogenous state moves whatever the choice; METHOD §4b counts it as persistent."""
    sim = simulate("ebike", units=200, periods=8, seed=2, n_covariates=5)
    frame = sim.data.copy()
    # x1 changes in three bikes, in a week that is not right after a swap.
    before_keep = frame.groupby(sim.unit)[sim.choice].shift(1) != sim.anchor
    rows = frame.index[(frame["week"] == 4) & before_keep & frame["bike"].isin([5, 9, 12, 40])][:3]
    units = sorted(frame.loc[rows, "bike"].tolist())
    frame.loc[frame["bike"].isin(units) & (frame["week"] >= 4), "x1"] += 1.0
    panel = oc.Panel(frame, unit=sim.unit, period=sim.period, choice=sim.choice, states=list(sim.states))
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        oc.estimate(panel, _persistent_model(sim), learner="logit", folds=3, scheme="plain")
    assert not [w for w in record if "persistent state 'x1'" in str(w.message)]


def test_exogenous_state_changing_at_the_same_rate_after_every_choice_does_not_warn() -> None:
    sim = simulate("ebike", units=300, periods=8, seed=2, n_covariates=5)
    frame = sim.data.copy()
    rng = np.random.default_rng(0)
    # an exogenous two-level chain: flips with probability 0.2 each period, whatever the choice
    flips = rng.random(len(frame)) < 0.2
    frame["x1"] = frame.assign(f=flips.astype(int)).groupby(sim.unit)["f"].cumsum() % 2
    panel = oc.Panel(frame, unit=sim.unit, period=sim.period, choice=sim.choice, states=list(sim.states))
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        oc.estimate(panel, _persistent_model(sim), learner="logit", folds=3, scheme="plain")
    assert not [w for w in record if "persistent state 'x1'" in str(w.message)]


def test_state_reset_by_the_renewal_warns_with_both_rates() -> None:
    sim = simulate("ebike", units=200, periods=8, seed=2, n_covariates=5)
    frame = sim.data.copy()
    after_swap = frame.groupby(sim.unit)[sim.choice].shift(1) == sim.anchor
    frame.loc[after_swap, "x1"] = 0.0  # the renewal resets x1
    panel = oc.Panel(frame, unit=sim.unit, period=sim.period, choice=sim.choice, states=list(sim.states))
    with pytest.warns(oc.OrthoCCPWarning) as record:
        oc.estimate(panel, _persistent_model(sim), learner="logit", folds=3, scheme="plain")
    texts = [str(w.message) for w in record if "persistent state 'x1'" in str(w.message)]
    assert len(texts) == 1
    assert re.search(r"changes right after a renewal in \d+ of \d+ renewal rows \(\d+\.\d%; e\.g\. "
                     r"bike=.*\), against \d+ of \d+ rows after the other choices \(\d+\.\d%\): "
                     r"the renewal appears to reset or move it", texts[0]), texts[0]


def test_constant_persistent_states_do_not_warn() -> None:
    sim = simulate("ebike", units=200, periods=8, seed=2, n_covariates=5)
    panel = oc.Panel(sim.data, unit=sim.unit, period=sim.period, choice=sim.choice, states=list(sim.states))
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        oc.estimate(panel, _persistent_model(sim), learner="logit", folds=3, scheme="plain")
    assert not [w for w in record if "persistent state" in str(w.message)
                or "renewal the next state" in str(w.message)]


def test_rows_after_a_terminal_choice_stay_an_error() -> None:
    sim = simulate("producers", units=100, periods=6, seed=1)
    frame = sim.data.copy()
    first = frame.index[frame[sim.unit] == frame[sim.unit].iloc[0]][0]
    frame.loc[first, sim.choice] = sim.anchor  # an exit followed by more rows
    panel = oc.Panel(frame, unit=sim.unit, period=sim.period, choice=sim.choice, states=list(sim.states))
    model = oc.Model(anchor=sim.anchor, kind=sim.kind, discount=sim.discount, utility=sim.utility)
    with pytest.raises(oc.InputError, match=r"a terminal choice must be a unit's last row"):
        oc.estimate(panel, model, learner="logit", folds=3)
