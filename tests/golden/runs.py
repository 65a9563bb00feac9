"""The fixed set of seeded runs behind the golden record (issue 23, "rules for the move").

Every run returns a flat mapping ``quantity -> list of floats`` (estimates, standard errors,
the covariance, the variance decomposition and, where present, the plug-in estimates), so
that ``make_golden.py`` can store them and ``tests/test_golden.py`` can compare them. The
runs are small (300 units x 8 periods) and seeded; the data are the project's simulated
scenarios and small invented designs, so the record is about the code's numbers, not about
any true value.

Do not edit a run without regenerating ``golden.json``: the record is only useful while the
runs it holds are the ones rerun here.
"""

from __future__ import annotations

import contextlib
import io
import json
import tempfile
import warnings
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

import orthoccp as oc
from orthoccp.cell import CellFrequencyRegressor
from orthoccp.custom import Nuisance, estimate_moments
from orthoccp.discrete import estimate_discrete
from orthoccp.discrete._scenario import INVENTORY, simulate_inventory
from orthoccp.montecarlo import run_montecarlo
from orthoccp.simulate import simulate

LIBRARIES = ("numpy", "scipy", "pandas", "scikit-learn", "lightgbm")
"""The libraries whose versions the record states; a different installed version skips the test."""

UNITS, PERIODS = 300, 8
SCENARIO_SEEDS = {"ebike": 11, "ebike3": 12, "producers": 13}

Numbers = dict[str, list[float]]


def library_versions() -> dict[str, str]:
    """Installed versions of :data:`LIBRARIES`."""
    from importlib.metadata import version

    return {name: version(name) for name in LIBRARIES}


def _floats(values: Any) -> list[float]:
    return [float(v) for v in np.asarray(values, dtype=np.float64).ravel()]


def _numbers(res: oc.Results) -> Numbers:
    out = {
        "params": _floats(res.params),
        "std_errors": _floats(res.std_errors),
        "cov": _floats(res.cov),
        "decomposition": _floats(res.decomposition.to_numpy(dtype=np.float64)),
    }
    plugin = getattr(res.details, "plugin_params", None)  # estimators that start from one
    if plugin is not None:
        out["plugin_params"] = _floats(plugin)
    return out


# --------------------------------------------------------------------------- orthoccp.estimate
def _scenario(name: str) -> tuple[oc.Panel, oc.Model]:
    sim = simulate(name, units=UNITS, periods=PERIODS, seed=SCENARIO_SEEDS[name])
    return sim.panel(), sim.model()


def _small_lightgbm() -> tuple[Any, Any]:
    """A small single-thread boosting pair (deterministic histograms, 30 trees)."""
    from lightgbm import LGBMClassifier, LGBMRegressor

    opts = dict(n_estimators=30, learning_rate=0.1, num_leaves=7, min_child_samples=40,
                subsample=0.8, subsample_freq=1, colsample_bytree=0.8, n_jobs=1,
                force_col_wise=True, deterministic=True, verbose=-1)
    return LGBMClassifier(**opts), LGBMRegressor(**opts)


def _ccp(name: str, *, debias: bool, moments: str, learner: str = "logit") -> Callable[[], Numbers]:
    def run() -> Numbers:
        panel, model = _scenario(name)
        if learner == "logit":
            res = oc.estimate(panel, model, learner="logit", folds=3, splits=2, seed=5,
                              debias=debias, moments=moments)
        else:
            clf, reg = _small_lightgbm()
            res = oc.estimate(panel, model, learner=clf, regressor=reg, folds=3, splits=2,
                              seed=5, debias=debias, moments=moments)
        return _numbers(res)

    return run


def _difference() -> Numbers:
    """``compare.difference_test`` between a logit and a boosting first stage (ebike)."""
    panel, model = _scenario("ebike")
    a = oc.estimate(panel, model, learner="logit", folds=3, seed=5, moments="standard")
    clf, reg = _small_lightgbm()
    b = oc.estimate(panel, model, learner=clf, regressor=reg, folds=3, seed=5, moments="standard")
    table = oc.difference_test(a, b)
    return {"difference": _floats(table["difference"]), "std_error": _floats(table["std_error"]),
            "wald": [float(table.attrs["wald"]["statistic"])]}


# --------------------------------------------------------------------------- discrete states
def _inventory_panel() -> oc.Panel:
    df = simulate_inventory(units=UNITS, periods=PERIODS, seed=7)
    return oc.Panel(df, unit="shop", period="period", choice="order", states=["stock"])


def _discrete(**options: Any) -> Callable[[], Numbers]:
    def run() -> Numbers:
        common: dict[str, Any] = dict(utility=INVENTORY.utility_spec(), discount=INVENTORY.discount,
                                      n_states=INVENTORY.n_states,
                                      small_sample=False)  # the default when recorded
        common.update(options)
        return _numbers(estimate_discrete(_inventory_panel(), **common))

    return run


# --------------------------------------------------------------------------- user moments
def _treatment_frame(n: int, seed: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    x = rng.integers(0, 4, n)
    d = (rng.random(n) < np.array([0.2, 0.4, 0.6, 0.8])[x]).astype(int)
    y = 1.0 + x + 2.0 * d + 0.5 * x * d + rng.standard_normal(n)
    return pd.DataFrame({"id": np.arange(n), "t": 0, "d": d, "x": x.astype(float), "y": y})


def _two_effect_moments(theta: np.ndarray, rows: Any, nu: dict[str, np.ndarray]) -> np.ndarray:
    e = nu["g1"] - nu["g0"] - theta[0]
    return np.column_stack([e, e * (rows["x"] - 1.5)])


def _moments_overidentified() -> Numbers:
    """Two moments for one effect (two-step GMM, Hansen's J), lasso Riesz correction."""
    panel = oc.Panel(_treatment_frame(600, seed=3), unit="id", period="t", choice="d", states=["x"])
    outcome = Nuisance(name="g", target="y", features=["x"], by="d",
                       at={"g1": {"d": 1}, "g0": {"d": 0}}, learner=CellFrequencyRegressor(),
                       dictionary="saturated")
    res = estimate_moments(panel, _two_effect_moments, [outcome], parameters=["ate"], seed=0,
                           penalty=0.0)
    out = _numbers(res)
    out["hansen_j"] = [float(res.hansen_j.statistic)]  # type: ignore[union-attr]
    return out


def _moments_renewal() -> Numbers:
    """The binary renewal model (METHOD §3) written as a user moment: non-linear in theta."""
    sim = simulate("ebike", units=UNITS, periods=PERIODS, seed=SCENARIO_SEEDS["ebike"])
    beta, states = sim.discount, list(sim.states)

    def lam(theta: np.ndarray, r: Any, nu: dict[str, np.ndarray]) -> np.ndarray:
        z = np.column_stack([r["wear_scaled"], -np.ones(r.n_rows)])
        return 1 / (1 + np.exp(-(z @ theta - beta * (nu["mu_keep"] - nu["mu_swap"]))))

    def score(theta: np.ndarray, r: Any, nu: dict[str, np.ndarray]) -> np.ndarray:
        z = np.column_stack([r["wear_scaled"], -np.ones(r.n_rows)])
        m = z * ((r["action"] == "keep").astype(float) - lam(theta, r, nu))[:, None]
        m[~r.has_next] = np.nan
        return m

    def levels(F: pd.DataFrame) -> np.ndarray:
        return (F["wear"].to_numpy()[:, None] == np.arange(25)[None, :]).astype(float)

    ccp = Nuisance(name="p_swap", target=lambda r, nu: (r["action"] == "swap").astype(float),
                   features=states, learner="logit", binary=True, at={"p_next": "next"},
                   dictionary=levels)
    mu = Nuisance(name="mu", target=lambda r, nu: np.log(nu["p_next"]), features=states,
                  by="action", learner="logit", dictionary=levels,
                  at={"mu_keep": {"action": "keep"}, "mu_swap": {"action": "swap"}})
    res = estimate_moments(sim.panel(), score, [ccp, mu], parameters=["wear_cost", "swap_cost"],
                           seed=0, next_weights="observed")
    return _numbers(res)


# --------------------------------------------------------------------------- Monte Carlo, CLI
def _montecarlo() -> Numbers:
    mc = run_montecarlo("ebike", reps=2, jobs=1, units=150, periods=6, learner="logit", folds=3,
                        n_covariates=5, seed=7, progress=False)
    rep = mc.replications.sort_values(["rep", "estimator", "parameter"])
    return {"estimate": _floats(rep["estimate"]), "std_error": _floats(rep["std_error"])}


def _cli_json() -> Numbers:
    from orthoccp.cli import main

    with tempfile.TemporaryDirectory() as folder, contextlib.redirect_stdout(io.StringIO()):
        data, out = Path(folder) / "panel.csv", Path(folder) / "result.json"
        if main(["simulate", "ebike", "--units", str(UNITS), "--periods", str(PERIODS), "--seed",
                 "4", "--covariates", "5", "--out", str(data)]) != 0:
            raise RuntimeError("orthoccp simulate failed")
        if main(["estimate", str(data), "--spec", str(data.with_suffix(".toml")), "--learner",
                 "logit", "--folds", "3", "--json", str(out)]) != 0:
            raise RuntimeError("orthoccp estimate failed")
        doc = json.loads(out.read_text())
    return {"params": [float(p["estimate"]) for p in doc["params"]],
            "std_errors": [float(p["std_error"]) for p in doc["params"]]}


RUNS: dict[str, Callable[[], Numbers]] = {
    "estimate/ebike/logit/debiased/standard": _ccp("ebike", debias=True, moments="standard"),
    "estimate/ebike/logit/debiased/renewal_robust": _ccp("ebike", debias=True, moments="renewal_robust"),
    "estimate/ebike/logit/plugin/standard": _ccp("ebike", debias=False, moments="standard"),
    "estimate/ebike3/logit/debiased/standard": _ccp("ebike3", debias=True, moments="standard"),
    "estimate/ebike3/logit/debiased/renewal_robust": _ccp("ebike3", debias=True, moments="renewal_robust"),
    "estimate/ebike3/logit/plugin/standard": _ccp("ebike3", debias=False, moments="standard"),
    "estimate/producers/logit/debiased/standard": _ccp("producers", debias=True, moments="standard"),
    "estimate/producers/logit/plugin/standard": _ccp("producers", debias=False, moments="standard"),
    "estimate/ebike/lightgbm/debiased/renewal_robust": _ccp(
        "ebike", debias=True, moments="renewal_robust", learner="lightgbm"),
    "difference_test/ebike/logit-vs-lightgbm": _difference,
    "discrete/npl/frequency/clustered": _discrete(transitions="frequency"),
    "discrete/npl/increments/heteroskedastic/small_sample": _discrete(
        transitions="increments", base=INVENTORY.bases(), cov="heteroskedastic", small_sample=True),
    "discrete/pml/frequency/clustered/small_sample": _discrete(
        transitions="frequency", estimator="pml", small_sample=True),
    "discrete/pml/simulation/clustered": _discrete(
        transitions="increments", base=INVENTORY.bases(), estimator="pml", values="simulation",
        n_paths=50, seed=11),
    "discrete/pml/simulation/heteroskedastic": _discrete(
        transitions="increments", base=INVENTORY.bases(), estimator="pml", values="simulation",
        n_paths=50, seed=11, cov="heteroskedastic"),
    "discrete/npl/frequency/clustered/no_transition_noise": _discrete(
        transitions="frequency", transition_noise=False, small_sample=True),
    "estimate_moments/overidentified": _moments_overidentified,
    "estimate_moments/renewal": _moments_renewal,
    "run_montecarlo/ebike/2reps": _montecarlo,
    "cli/estimate/json": _cli_json,
}
"""Run name -> the call that produces its numbers."""


def run(name: str) -> Numbers:
    """One run of :data:`RUNS`, with the project's warnings silenced (they are not recorded)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return RUNS[name]()
