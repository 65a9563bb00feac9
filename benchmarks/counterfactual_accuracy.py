"""How far is fitted value iteration from the exact counterfactual, per averager?

At the true parameters of each built-in scenario, add one util to the anchor's payoff (a
subsidy of the swap, the overhaul, or the exit) and compare the change in the anchor's share
over the sample's rows: fitted value iteration on the data rows (``orthoccp.counterfactual``'s
solver, each averager) against the simulator's exact re-solve of the true model at the changed
payoffs (the same rows). This isolates the averager's error: no parameter is estimated.
Also times the averager and the two solves against an estimate (LightGBM, 5 folds) of the same
panel, as a ratio within one run.

Reproduce::

    python benchmarks/counterfactual_accuracy.py --units 2000 --periods 10 --seeds 3

Writes ``benchmarks/results/counterfactual_accuracy.json``.
"""

from __future__ import annotations

import argparse
import json
import os
import time
from pathlib import Path

os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

import numpy as np  # noqa: E402

import orthoccp as oc  # noqa: E402
from orthoccp.counterfactual import fit_averager, solve_on_rows  # noqa: E402
from orthoccp.simulate import simulate  # noqa: E402
from orthoccp.simulate._solve import Model as ExactModel, solve  # noqa: E402

RESULTS = Path(__file__).parent / "results"
AVERAGERS = ("forest", "knn", "cells")


def one(scenario: str, units: int, periods: int, seed: int) -> list[dict]:
    sim = simulate(scenario, units=units, periods=periods, seed=seed)
    panel, model = sim.panel(), sim.model()
    bound = model.bind(panel)
    theta = np.array([sim.truth[p] for p in bound.parameters])
    R = list(sim.choices).index(sim.anchor)
    Rp = panel.choices.index(sim.anchor)
    m = sim.solution.model
    flow = m.flow.copy()
    flow[:, :, R] += 1.0
    exact = solve(ExactModel(flow, m.transitions, m.discount, m.anchor, m.kind))
    rows = (sim.unit_index, sim.state_index)
    base_exact = sim.solution.ccp[rows][:, R]
    want = float((exact.ccp[rows][:, R] - base_exact).mean())
    t0 = time.perf_counter()
    oc.estimate(panel, model, learner="lightgbm", seed=seed)
    t_est = time.perf_counter() - t0
    out = []
    for av in AVERAGERS:
        t1 = time.perf_counter()
        avg = fit_averager(bound, averager=av, seed=seed)
        u = bound.Z @ theta
        base = solve_on_rows(u, avg, model.discount)
        u2 = u.copy()
        u2[:, Rp] += 1.0
        cf = solve_on_rows(u2, avg, model.discount, start=base.value)
        got = float((cf.ccp[:, Rp] - base.ccp[:, Rp]).mean())
        out.append({
            "scenario": scenario, "seed": seed, "units": units, "periods": periods,
            "averager": av, "exact_change": want, "fvi_change": got,
            "relative_error": (got - want) / want,
            "baseline_mae": float(np.abs(base.ccp[:, Rp] - base_exact).mean()),
            "fallback_rows": avg.fallback_rows,
            "seconds_over_estimate": (time.perf_counter() - t1) / t_est,
        })
        print(json.dumps(out[-1]), flush=True)
    return out


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--units", type=int, default=2000)
    p.add_argument("--periods", type=int, default=10)
    p.add_argument("--seeds", type=int, default=3)
    p.add_argument("--scenarios", nargs="+", default=["ebike", "ebike3", "producers"])
    p.add_argument("--out", type=Path, default=RESULTS / "counterfactual_accuracy.json")
    a = p.parse_args()
    rows = []
    for scen in a.scenarios:
        for seed in range(a.seeds):
            rows.extend(one(scen, a.units, a.periods, seed))
    summary = {}
    for scen in a.scenarios:
        for av in AVERAGERS:
            r = [x for x in rows if x["scenario"] == scen and x["averager"] == av]
            summary[f"{scen}|{av}"] = {
                "exact_change_mean": float(np.mean([x["exact_change"] for x in r])),
                "mean_abs_relative_error": float(np.mean([abs(x["relative_error"]) for x in r])),
                "max_abs_relative_error": float(np.max([abs(x["relative_error"]) for x in r])),
                "baseline_mae": float(np.mean([x["baseline_mae"] for x in r])),
                "seconds_over_estimate": float(np.mean([x["seconds_over_estimate"] for x in r])),
            }
    a.out.write_text(json.dumps({"version": oc.__version__, "settings": vars(a) | {"out": str(a.out)},
                                 "rows": rows, "summary": summary}, indent=1) + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
