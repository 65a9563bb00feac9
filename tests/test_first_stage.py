"""The public first stage (``orthoccp.first_stage``): the estimator's own cross-fitted
nuisances as data, on the user's rows."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import orthoccp as oc
from orthoccp.simulate import simulate


@pytest.fixture(scope="module")
def ebike():  # type: ignore[no-untyped-def]
    sim = simulate("ebike", units=300, periods=6, seed=4)
    panel = oc.Panel(sim.data, unit=sim.unit, period=sim.period, choice=sim.choice,
                     states=list(sim.states))
    return sim, panel


@pytest.mark.parametrize("learner", ["logit", "lightgbm"])
@pytest.mark.parametrize("moments", ["standard", "renewal_robust"])
def test_estimate_on_the_exported_first_stage_is_estimate(ebike, moments: str, learner: str) -> None:  # type: ignore[no-untyped-def]
    """``estimate(nuisances=first_stage(...).nuisances)`` equals ``estimate(...)`` with the
    same options: the export is the estimator's own first stage, not a re-implementation.
    The renewal-robust projections draw their learner seeds from their own named stream
    (``orthoccp._random``), so with a seed-dependent learner (LightGBM) they agree too."""
    sim, panel = ebike
    model = sim.model()
    opts = dict(learner=learner, folds=3, seed=11, moments=moments)
    fs = oc.first_stage(panel, model, **opts)
    assert fs.moments == moments
    direct = oc.estimate(panel, model, **opts)
    again = oc.estimate(panel, model, nuisances=fs.nuisances, **opts)
    np.testing.assert_allclose(again.params, direct.params, rtol=1e-10, atol=0)
    np.testing.assert_allclose(again.std_errors, direct.std_errors, rtol=1e-10, atol=0)


def test_the_table_sits_on_the_users_rows(ebike) -> None:  # type: ignore[no-untyped-def]
    """Shuffled input rows with their own index labels: each output row carries the label of
    the input row it belongs to (unit and period match), whatever order the panel sorts."""
    sim, _ = ebike
    shuffled = sim.data.sample(frac=1.0, random_state=3)
    shuffled.index = [f"r{i}" for i in range(len(shuffled))]
    panel = oc.Panel(shuffled, unit=sim.unit, period=sim.period, choice=sim.choice,
                     states=list(sim.states))
    fs = oc.first_stage(panel, sim.model(), learner="logit", folds=3)
    table = fs.to_frame()
    assert len(table) == len(shuffled) and table.index.is_unique
    assert set(table.index) == set(shuffled.index)
    back = shuffled.loc[table.index]
    np.testing.assert_array_equal(table[sim.unit].to_numpy(), back[sim.unit].to_numpy())
    np.testing.assert_array_equal(table[sim.period].to_numpy(), back[sim.period].to_numpy())
    ccp = table[[f"ccp.{c}" for c in panel.choices]].to_numpy()
    np.testing.assert_allclose(ccp.sum(axis=1), 1.0, rtol=1e-12)
    # a unit's rows share one fold
    assert table.groupby(sim.unit)["fold"].nunique().max() == 1
    assert sorted(table["fold"].unique()) == [0, 1, 2]


def test_columns_name_every_component(ebike) -> None:  # type: ignore[no-untyped-def]
    """The continuation columns: one per choice and component, the last the log anchor CCP."""
    sim, panel = ebike
    fs = oc.first_stage(panel, sim.model(), learner="logit", folds=3, moments="standard")
    J, d = len(panel.choices), len(fs.components)
    assert fs.nuisances.mu.shape == (panel.n_rows, J, d)
    assert fs.components[-1] == f"log_p_{sim.anchor}"
    cols = [c for c in fs.to_frame().columns if c.startswith("mu.")]
    assert cols == [f"mu.{a}.{c}" for a in panel.choices for c in fs.components]
    # the table holds the arrays, in the panel's row order (the input here is sorted already)
    table = fs.to_frame()
    for j, a in enumerate(panel.choices):
        for c, comp in enumerate(fs.components):
            np.testing.assert_array_equal(table[f"mu.{a}.{comp}"].to_numpy(), fs.nuisances.mu[:, j, c])


def test_dropped_rows_are_left_out_and_counted(ebike) -> None:  # type: ignore[no-untyped-def]
    sim, _ = ebike
    data = sim.data.copy()
    data.loc[data.index[[5, 17]], sim.states[0]] = np.nan
    with pytest.warns(oc.OrthoCCPWarning, match="dropped 2 of"):
        panel = oc.Panel(data, unit=sim.unit, period=sim.period, choice=sim.choice,
                         states=list(sim.states), missing="drop")
    table = oc.first_stage(panel, sim.model(), learner="logit", folds=3).to_frame()
    assert len(table) == len(data) - 2
    assert data.index[5] not in table.index and data.index[17] not in table.index


@pytest.mark.parametrize("bad, message", [
    (dict(folds=1), "folds"),
    (dict(scheme="inner"), "scheme"),
    (dict(moments="robust"), "moments"),
])
def test_bad_options_are_named(ebike, bad, message) -> None:  # type: ignore[no-untyped-def]
    sim, panel = ebike
    with pytest.raises(oc.InputError, match=message):
        oc.first_stage(panel, sim.model(), learner="logit", **bad)


def test_a_frame_is_not_a_panel(ebike) -> None:  # type: ignore[no-untyped-def]
    sim, _ = ebike
    with pytest.raises(oc.InputError, match="orthoccp.Panel"):
        oc.first_stage(pd.DataFrame(sim.data), sim.model())  # type: ignore[arg-type]
