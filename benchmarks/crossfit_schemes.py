"""Small Monte Carlo: plug-in vs debiased, and the plain vs nested cross-fitting schemes.

On the e-bike renewal scenario (LightGBM first stages), each replication simulates a panel,
cross-fits the nuisances with both schemes, and estimates plug-in and debiased parameters on the
same nuisances; the oracle uses the simulator's exact nuisances. Writes
``benchmarks/results/crossfit_schemes.json``. Reproduce with::

    python benchmarks/crossfit_schemes.py --reps 30 --units 1000 --periods 12
"""

from __future__ import annotations

import argparse
import json
import time
from pathlib import Path

import numpy as np
from lightgbm import LGBMClassifier, LGBMRegressor

import orthoccp as oc
from orthoccp.folds import unit_folds
from orthoccp.learners import _lgbm_common, resolve_learners
from orthoccp.nuisance import crossfit_nuisances
from orthoccp.simulate import simulate


def one_rep(rep: int, units: int, periods: int, scenario: str) -> dict:
    sim = simulate(scenario, units=units, periods=periods, seed=1000 + rep)
    panel = oc.Panel(sim.data, unit=sim.unit, period=sim.period, choice=sim.choice, states=list(sim.states))
    model = oc.Model(anchor=sim.anchor, kind=sim.kind, discount=sim.discount, utility=sim.utility)
    bound = model.bind(panel)
    opts = _lgbm_common() | {"n_jobs": 1}
    pair = resolve_learners(LGBMClassifier(**opts), LGBMRegressor(**opts))
    order = [list(sim.choices).index(c) for c in panel.choices]
    out: dict = {}
    oracle = oc.nuisances_from_truth(bound, sim.ccp[:, order], sim.continuation[:, order])
    r = oc.estimate(panel, model, nuisances=oracle, debias=False)
    out["oracle"] = (r.params.to_dict(), r.std_errors.to_dict())
    for scheme in ("plain", "nested"):
        rng = np.random.default_rng(rep)
        folds = unit_folds(panel.unit_codes, 5, rng, unit_keys=panel.unit_keys)
        t0 = time.perf_counter()
        nu = crossfit_nuisances(bound, pair, folds, rng, scheme=scheme)
        secs = time.perf_counter() - t0
        for debias in (False, True):
            r = oc.estimate(panel, model, nuisances=nu, debias=debias)
            key = f"{'debiased' if debias else 'plug_in'}_{scheme}"
            out[key] = (r.params.to_dict(), r.std_errors.to_dict())
        out[f"first_stage_s_{scheme}"] = secs
    out["truth"] = sim.truth
    return out


def summarise(reps: list[dict]) -> dict:
    truth = reps[0]["truth"]
    table: dict = {}
    for est in [k for k in reps[0] if isinstance(reps[0][k], tuple | list) and k != "truth"]:
        table[est] = {}
        for p, t in truth.items():
            est_v = np.array([r[est][0][p] for r in reps])
            se_v = np.array([r[est][1][p] for r in reps])
            cover = np.abs(est_v - t) <= 1.959963984540054 * se_v
            table[est][p] = {
                "bias": float(est_v.mean() - t),
                "sd": float(est_v.std(ddof=1)),
                "mean_se": float(se_v.mean()),
                "median_se": float(np.median(se_v)),
                "rmse": float(np.sqrt(((est_v - t) ** 2).mean())),
                "coverage": float(cover.mean()),
                "coverage_mcse": float(np.sqrt(cover.mean() * (1 - cover.mean()) / len(reps))),
            }
    return table


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--reps", type=int, default=30)
    ap.add_argument("--units", type=int, default=1000)
    ap.add_argument("--periods", type=int, default=12)
    ap.add_argument("--scenario", default="ebike")
    a = ap.parse_args()
    t0 = time.perf_counter()
    reps = []
    for rep in range(a.reps):
        reps.append(one_rep(rep, a.units, a.periods, a.scenario))
        print(f"rep {rep + 1}/{a.reps} done ({time.perf_counter() - t0:.0f} s)", flush=True)
    result = {
        "scenario": a.scenario, "units": a.units, "periods": a.periods, "reps": a.reps,
        "learner": "lightgbm (1 thread)", "folds": 5,
        "summary": summarise(reps),
        "first_stage_s": {s: float(np.median([r[f"first_stage_s_{s}"] for r in reps])) for s in ("plain", "nested")},
        "wall_s": time.perf_counter() - t0,
    }
    path = Path(__file__).parent / "results" / f"crossfit_schemes_{a.scenario}.json"
    path.write_text(json.dumps(result, indent=2))
    print(json.dumps(result["summary"], indent=1))


if __name__ == "__main__":
    main()
