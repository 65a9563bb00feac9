"""Monte Carlo: standard vs renewal-robust moments on the e-bike renewal scenarios.

Each replication simulates a panel and estimates the debiased model twice with LightGBM
first stages (defaults: 5 folds, nested scheme): once with the standard moment of METHOD §4 and
once with the renewal-robust moments of METHOD §4b, which use the 30 route covariates as the
persistent states. Writes ``benchmarks/results/renewal_robust_<scenario>.json``. Reproduce
with::

    python benchmarks/renewal_robust.py --scenario ebike --reps 100 --units 1000 --periods 12

The run is resumable: stored replications of the same design are kept.
"""

from __future__ import annotations

import argparse
import json
import time
import warnings
from pathlib import Path

import numpy as np

import orthoccp as oc
from orthoccp.simulate import simulate

Z95 = 1.959963984540054


def one_rep(rep: int, scenario: str, units: int, periods: int) -> dict:
    sim = simulate(scenario, units=units, periods=periods, seed=2000 + rep)
    panel = oc.Panel(sim.data, unit=sim.unit, period=sim.period, choice=sim.choice, states=list(sim.states))
    model = oc.Model(anchor=sim.anchor, kind=sim.kind, discount=sim.discount, utility=sim.utility,
                     persistent=sim.persistent)
    out: dict = {"truth": sim.truth}
    for moments in ("standard", "renewal_robust"):
        t0 = time.perf_counter()
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", oc.OrthoCCPWarning)
                r = oc.estimate(panel, model, moments=moments, seed=rep)
            out[moments] = {"params": r.params.to_dict(), "se": r.std_errors.to_dict(),
                            "seconds": time.perf_counter() - t0}
        except oc.EstimationError as exc:
            out[moments] = {"error": str(exc)}
    return out


def summarise(reps: list[dict]) -> dict:
    truth = reps[0]["truth"]
    table: dict = {}
    for est in ("standard", "renewal_robust"):
        ok = [r[est] for r in reps if "error" not in r[est]]
        table[est] = {"failures": len(reps) - len(ok),
                      "median_seconds": float(np.median([r["seconds"] for r in ok]))}
        for p, t in truth.items():
            e = np.array([r["params"][p] for r in ok])
            s = np.array([r["se"][p] for r in ok])
            cover = np.abs(e - t) <= Z95 * s
            table[est][p] = {
                "bias": float(e.mean() - t), "sd": float(e.std(ddof=1)),
                "mean_se": float(s.mean()), "median_se": float(np.median(s)),
                "max_se": float(s.max()), "rmse": float(np.sqrt(((e - t) ** 2).mean())),
                "coverage": float(cover.mean()),
                "coverage_mcse": float(np.sqrt(cover.mean() * (1 - cover.mean()) / len(ok))),
            }
    for p in truth:
        table.setdefault("se_ratio_standard_over_robust", {})[p] = (
            table["standard"][p]["median_se"] / table["renewal_robust"][p]["median_se"]
        )
    return table


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scenario", default="ebike", choices=["ebike", "ebike3"])
    ap.add_argument("--reps", type=int, default=30)
    ap.add_argument("--units", type=int, default=1000)
    ap.add_argument("--periods", type=int, default=12)
    a = ap.parse_args()
    path = Path(__file__).parent / "results" / f"renewal_robust_{a.scenario}.json"
    # Resumable: replication r always uses simulator seed 2000 + r and estimator seed r, so the
    # stored replications of the same design are kept and only the missing ones are run.
    design = {"scenario": a.scenario, "units": a.units, "periods": a.periods,
              "learner": "lightgbm", "folds": 5, "scheme": "nested"}
    reps: list[dict] = []
    wall = 0.0
    if path.exists():
        old = json.loads(path.read_text())
        if all(old.get(k) == v for k, v in design.items()) and "replications" in old:
            reps, wall = old["replications"][: a.reps], float(old.get("wall_s", 0.0))
            print(f"{len(reps)} replications stored, running the rest", flush=True)
    t0 = time.perf_counter()
    result = None
    for rep in range(len(reps), a.reps):
        reps.append(one_rep(rep, a.scenario, a.units, a.periods))
        print(f"rep {rep + 1}/{a.reps} ({time.perf_counter() - t0:.0f} s)", flush=True)
        if (rep + 1) % 5 == 0 or rep + 1 == a.reps:
            result = {**design, "reps_done": rep + 1, "summary": summarise(reps),
                      "wall_s": wall + time.perf_counter() - t0, "replications": reps}
            path.write_text(json.dumps(result, indent=2))
    if result is None:  # nothing left to run: rewrite the summary of the stored replications
        result = {**design, "reps_done": len(reps), "summary": summarise(reps), "wall_s": wall,
                  "replications": reps}
        path.write_text(json.dumps(result, indent=2))
    print(json.dumps(result["summary"], indent=1))


if __name__ == "__main__":
    main()
