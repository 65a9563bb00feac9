"""Do the counterfactual's intervals cover? A Monte Carlo against the exact answer.

Per replication: simulate a panel of a built-in scenario, estimate it (default options,
LightGBM), and evaluate a subsidy of one util on the anchor (``shift={anchor: 1}``) with
``orthoccp.counterfactual`` (default forest averager). The targets are population values,
computed once from the simulator's exact solutions on a large panel of the same design (the
mean over its rows of the exact change in the anchor's probability; the mean over its units of
the exact change in the expected discounted value at the first state). Records, per statistic,
bias, SD, mean s.e., coverage of the nominal 95 % interval, and the time of the counterfactual
over that of the estimate (a ratio within each replication).

Reproduce::

    python benchmarks/counterfactual_coverage.py --scenario ebike --reps 100 --units 1000

Resumable; writes ``benchmarks/results/counterfactual_coverage.json``.
"""

from __future__ import annotations

import argparse
import json
import os
import time
import warnings
from pathlib import Path

os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

import numpy as np  # noqa: E402

import orthoccp as oc  # noqa: E402
from orthoccp.simulate import simulate  # noqa: E402
from orthoccp.simulate._solve import Model as ExactModel, solve  # noqa: E402

RESULTS = Path(__file__).parent / "results"
SHIFT = 1.0


def truth(scenario: str, periods: int, units: int = 20000, seed: int = 987654) -> dict[str, float]:
    """Population values of the two statistics from a large panel's exact solutions."""
    sim = simulate(scenario, units=units, periods=periods, seed=seed)
    m = sim.solution.model
    R = list(sim.choices).index(sim.anchor)
    flow = m.flow.copy()
    flow[:, :, R] += SHIFT
    exact = solve(ExactModel(flow, m.transitions, m.discount, m.anchor, m.kind))
    rows = (sim.unit_index, sim.state_index)
    share = float((exact.ccp[rows][:, R] - sim.solution.ccp[rows][:, R]).mean())
    first = np.r_[True, sim.unit_index[1:] != sim.unit_index[:-1]]
    f = (sim.unit_index[first], sim.state_index[first])
    value = float((exact.V[f] - sim.solution.V[f]).mean())
    return {f"share[{sim.anchor}]": share, "value per unit (utils)": value}


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--scenario", default="ebike")
    p.add_argument("--reps", type=int, default=100)
    p.add_argument("--units", type=int, default=1000)
    p.add_argument("--periods", type=int, default=10)
    p.add_argument("--out", type=Path, default=RESULTS / "counterfactual_coverage.json")
    a = p.parse_args()
    doc = json.loads(a.out.read_text()) if a.out.exists() else {"cells": {}}
    key = f"{a.scenario}|N={a.units}|T={a.periods}"
    cell = doc["cells"].setdefault(key, {"replications": []})
    if "truth" not in cell:
        cell["truth"] = truth(a.scenario, a.periods)
    targets = cell["truth"]
    done = {r["rep"] for r in cell["replications"]}
    for rep in range(a.reps):
        if rep in done:
            continue
        sim = simulate(a.scenario, units=a.units, periods=a.periods, seed=10_000 + rep)
        panel, model = sim.panel(), sim.model()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            t0 = time.perf_counter()
            res = oc.estimate(panel, model, seed=rep)
            t1 = time.perf_counter()
            cf = oc.counterfactual(res, panel, model, shift={sim.anchor: SHIFT}, seed=rep)
            t2 = time.perf_counter()
        for stat, want in targets.items():
            r = cf.table.loc[(stat, "difference")]
            cell["replications"].append({
                "rep": rep, "statistic": stat, "truth": want, "estimate": float(r.estimate),
                "std_error": float(r.std_error),
                "covers": bool(r.ci_lower <= want <= r.ci_upper),
                "cost_over_estimate": (t2 - t1) / (t1 - t0),
            })
        cell["summary"] = summarise(cell["replications"])
        doc["version"] = oc.__version__
        a.out.write_text(json.dumps(doc, indent=1) + "\n")
        print(rep, json.dumps(cell["summary"]), flush=True)
    return 0


def summarise(reps: list[dict]) -> dict[str, dict[str, float]]:
    out = {}
    for stat in sorted({r["statistic"] for r in reps}):
        rs = [r for r in reps if r["statistic"] == stat]
        est = np.array([r["estimate"] for r in rs])
        t = rs[0]["truth"]
        sd = float(est.std(ddof=1)) if len(rs) > 1 else float("nan")
        out[stat] = {"reps": len(rs), "truth": t, "bias": float(est.mean() - t), "sd": sd,
                     "bias_over_sd": float((est.mean() - t) / sd) if sd > 0 else float("nan"),
                     "mean_se": float(np.mean([r["std_error"] for r in rs])),
                     "coverage": float(np.mean([r["covers"] for r in rs])),
                     "cost_over_estimate": float(np.median([r["cost_over_estimate"] for r in rs]))}
    return out


if __name__ == "__main__":
    raise SystemExit(main())
