"""How far the debiased estimator is from the best its own moment can do.

The coverage benchmark compares the debiased estimator with the oracle: the *plug-in* moment
solved at the simulator's exact nuisances. That oracle pays nothing for the CCPs, so its spread
is not reachable by any estimator that must estimate them. This benchmark adds the
``oracle_debiased`` estimator of :func:`orthoccp.montecarlo.run_montecarlo`: the debiased
estimator's *corrected* moment ψ = m + φ_μ + φ_P solved at the exact nuisances. Its spread is
the debiased estimator's asymptotic spread (the influence function at the truth), so

* RMSE(oracle_debiased) / RMSE(oracle) is the price of not knowing the CCPs, fixed by the
  moment and the design, which no learner removes;
* RMSE(debiased) / RMSE(oracle_debiased) is what the learner costs on a finite sample.

It reruns the headline cells of ``benchmarks/coverage.py`` (2,000 units x 12 periods,
LightGBM for the renewal-robust projections, 5 folds, seed 0) with the estimators ``oracle``
and ``oracle_debiased`` only. The seeds equal the coverage cells', so every replication's
panel is the same; the script checks this by requiring the oracle's estimates to equal the
stored ones, and then pairs the stored debiased estimates with the new ones. Reads
``benchmarks/results/coverage.json``, writes ``benchmarks/results/oracle_moment.json``.
Reproduce with::

    python benchmarks/oracle_moment.py --reps 200 --jobs 2
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from pathlib import Path
from typing import Any

os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from coverage import FOLDS, HEADLINE, PERIODS, RESULTS, SCENARIOS, SEED, cell_key  # noqa: E402

from orthoccp import __version__  # noqa: E402
from orthoccp.montecarlo import MonteCarloResults, run_montecarlo  # noqa: E402

OUT = RESULTS / "oracle_moment.json"


def _by_rep(frame: pd.DataFrame, estimator: str) -> pd.DataFrame:
    rows = frame[(frame["estimator"] == estimator) & ~frame["failed"]]
    return rows.pivot(index="rep", columns="parameter", values="estimate")


def compare(stored: MonteCarloResults, new: MonteCarloResults) -> dict[str, Any]:
    """Paired statistics of the stored debiased estimates and the new oracle_debiased ones."""
    old_oracle = _by_rep(stored.replications, "oracle")
    new_oracle = _by_rep(new.replications, "oracle")
    common = old_oracle.index.intersection(new_oracle.index)
    same_panels = float(np.max(np.abs(old_oracle.loc[common] - new_oracle.loc[common]).to_numpy()))
    if same_panels > 1e-8:
        sys.exit(f"oracle_moment.py: the oracle estimates differ from coverage.json's by "
                 f"{same_panels:.3g}; the panels are not the same, so nothing can be paired.")
    debiased = _by_rep(stored.replications, "debiased")
    corrected = _by_rep(new.replications, "oracle_debiased")
    reps = debiased.index.intersection(corrected.index).intersection(common)
    rows = []
    for param, truth in stored.truth.items():
        err = {
            "oracle": new_oracle.loc[reps, param] - truth,
            "oracle_debiased": corrected.loc[reps, param] - truth,
            "debiased": debiased.loc[reps, param] - truth,
        }
        rmse = {k: float(np.sqrt(np.mean(v**2))) for k, v in err.items()}
        rows.append({
            "parameter": param,
            "paired_reps": int(len(reps)),
            **{f"rmse_{k}": v for k, v in rmse.items()},
            **{f"bias_over_sd_{k}": float(v.mean() / v.std(ddof=1)) for k, v in err.items()},
            "price_of_unknown_ccp": rmse["oracle_debiased"] / rmse["oracle"],
            "learner_cost": rmse["debiased"] / rmse["oracle_debiased"],
            "debiased_over_oracle": rmse["debiased"] / rmse["oracle"],
            "corr_debiased_oracle_debiased": float(np.corrcoef(err["debiased"],
                                                               err["oracle_debiased"])[0, 1]),
        })
    return {"max_abs_oracle_difference": same_panels, "parameters": rows}


def table_text(doc: dict[str, Any]) -> str:
    lines = ["| scenario | parameter | RMSE oracle | RMSE oracle, corrected moment | RMSE debiased "
             "| price of unknown CCPs | learner's cost | corrected-moment oracle bias / SD |",
             "|---|---|---:|---:|---:|---:|---:|---:|"]
    for key, cell in doc["cells"].items():
        for r in cell["paired"]["parameters"]:
            lines.append(
                f"| {key.split('|')[0]} | {r['parameter']} | {r['rmse_oracle']:.3f} "
                f"| {r['rmse_oracle_debiased']:.3f} | {r['rmse_debiased']:.3f} "
                f"| {r['price_of_unknown_ccp']:.2f} | {r['learner_cost']:.2f} "
                f"| {r['bias_over_sd_oracle_debiased']:+.2f} |")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> dict[str, Any]:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--reps", type=int, default=200)
    ap.add_argument("--scenario", nargs="+", choices=SCENARIOS, default=list(SCENARIOS))
    ap.add_argument("--jobs", type=int, default=1)
    ap.add_argument("--coverage", type=Path, default=RESULTS / "coverage.json")
    ap.add_argument("--out", type=Path, default=OUT)
    args = ap.parse_args(argv)
    cells = json.loads(args.coverage.read_text(encoding="utf-8"))["cells"]
    doc: dict[str, Any] = (json.loads(args.out.read_text(encoding="utf-8"))
                           if args.out.exists() else {"cells": {}})
    units, learner = HEADLINE["units"], HEADLINE["learner"]
    for scenario in args.scenario:
        key = cell_key(scenario, units, learner)
        if key not in cells:
            sys.exit(f"oracle_moment.py: {key} is not in {args.coverage}; run coverage.py first.")
        stored = MonteCarloResults.from_dict(cells[key]["mc"])
        t0 = time.perf_counter()
        new = run_montecarlo(scenario, reps=args.reps, units=units, periods=PERIODS,
                             learner=learner, folds=FOLDS, seed=SEED, jobs=args.jobs,
                             estimators=("oracle", "oracle_debiased"))
        doc["cells"][key] = {"reps": args.reps, "wall_seconds": time.perf_counter() - t0,
                             "paired": compare(stored, new), "mc": new.to_dict()}
        args.out.write_text(json.dumps(doc, indent=1, allow_nan=False) + "\n", encoding="utf-8")
        print(f"{key}: {args.reps} replications in {doc['cells'][key]['wall_seconds']:.0f} s",
              flush=True)
    doc["orthoccp_version"] = __version__
    doc["updated"] = time.strftime("%Y-%m-%d %H:%M:%S")
    args.out.write_text(json.dumps(doc, indent=1, allow_nan=False) + "\n", encoding="utf-8")
    print(table_text(doc))
    return doc


if __name__ == "__main__":
    main()
