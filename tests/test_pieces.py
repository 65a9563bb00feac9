"""Per-row moment pieces on every CCP result (``Results.moment_pieces``)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import orthoccp as oc
from orthoccp.simulate import simulate


@pytest.fixture(scope="module")
def ebike():  # type: ignore[no-untyped-def]
    sim = simulate("ebike", units=300, periods=6, seed=4)
    data = sim.data.copy()
    data.index = [f"row{i}" for i in range(len(data))]
    panel = oc.Panel(data, unit=sim.unit, period=sim.period, choice=sim.choice,
                     states=list(sim.states))
    return sim, data, panel


@pytest.mark.parametrize("moments", ["standard", "renewal_robust"])
def test_the_pieces_rebuild_the_estimate_and_its_covariance(ebike, moments: str) -> None:  # type: ignore[no-untyped-def]
    """sum psi(theta_hat) = 0 (the solve's own equation), and the clustered sandwich rebuilt
    from the pieces, n/(n-1) G^-1 (sum_i s_i s_i') G^-1', equals the reported covariance."""
    sim, data, panel = ebike
    res = oc.estimate(panel, sim.model(), learner="logit", folds=3, seed=2, moments=moments)
    pc = res.moment_pieces()
    psi = pc.psi()
    assert np.abs(psi.sum(axis=0)).max() < 1e-8 * np.abs(psi).sum()
    s = pd.DataFrame(psi).groupby(pc.units).sum().to_numpy()
    n = s.shape[0]
    Ginv = np.linalg.inv(pc.jacobian())
    V = n / (n - 1) * Ginv @ (s.T @ s) @ Ginv.T
    np.testing.assert_allclose(V, res.cov.to_numpy(), rtol=1e-10)
    frame = pc.to_frame()
    assert len(frame) == res.n_moment_rows
    for k, p in enumerate(res.params.index):
        np.testing.assert_allclose(frame[f"psi.{p}"], frame[f"m.{p}"] + frame[f"phi_mu.{p}"]
                                   + frame[f"phi_P.{p}"], rtol=1e-12, atol=1e-15)
    assert ("A.keep.wear_cost" in frame.columns) == (moments == "renewal_robust")


def test_rows_carry_the_input_labels(ebike) -> None:  # type: ignore[no-untyped-def]
    sim, data, panel = ebike
    res = oc.estimate(panel, sim.model(), learner="logit", folds=3, moments="standard")
    frame = res.moment_pieces().to_frame()
    back = data.loc[frame.index]
    np.testing.assert_array_equal(frame["unit"].to_numpy(), back[sim.unit].to_numpy())
    np.testing.assert_array_equal(frame["choice"].to_numpy(), back[sim.choice].astype(str).to_numpy())
    # X.keep.wear_cost = z_keep - z_swap for wear_cost: the data column wear_scaled
    np.testing.assert_allclose(frame["X.keep.wear_cost"], back["wear_scaled"], rtol=1e-12)


def test_pieces_at_another_theta(ebike) -> None:  # type: ignore[no-untyped-def]
    """At theta != theta_hat the moment no longer sums to zero; a Series is read by name."""
    sim, _, panel = ebike
    res = oc.estimate(panel, sim.model(), learner="logit", folds=3, moments="standard")
    pc = res.moment_pieces()
    shifted = res.params + res.std_errors
    assert np.abs(pc.psi(shifted).sum(axis=0)).max() > 1.0
    np.testing.assert_array_equal(pc.psi(shifted[::-1]), pc.psi(shifted.to_numpy()))
    with pytest.raises(oc.InputError, match="theta must hold 2 finite values"):
        pc.psi([1.0])


def test_splits_and_other_results(ebike) -> None:  # type: ignore[no-untyped-def]
    sim, _, panel = ebike
    res = oc.estimate(panel, sim.model(), learner="logit", folds=3, splits=2, moments="standard")
    assert np.allclose(res.moment_pieces(2).theta, res.split_params.iloc[1].to_numpy())
    with pytest.raises(oc.InputError, match="split must be an integer from 1 to 2"):
        res.moment_pieces(3)
    rng = np.random.default_rng(0)
    df = pd.DataFrame({"id": np.arange(200), "t": 0, "d": rng.integers(0, 2, 200),
                       "x": rng.standard_normal(200)})
    p = oc.Panel(df, unit="id", period="t", choice="d", states=["x"])
    g = oc.Nuisance(name="g", target="x", features=["x"], learner="logit")
    other = oc.estimate_moments(p, lambda th, r, nu: nu["g"] - th[0], [g], parameters=["mean"],
                                folds=2, debias=False)
    # the pieces belong to the CCP estimator's details; user moments have none
    with pytest.raises(AttributeError, match="no attribute 'moment_pieces'.*MomentDetails"):
        other.moment_pieces()
    with pytest.raises(oc.InputError, match="no per-row moment pieces"):
        oc.Results.from_json(res.to_json()).moment_pieces()
