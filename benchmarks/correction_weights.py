"""Corrections weighted at the solution or at the plug-in solution: paired Monte Carlo.

``estimate(correction_weights="solution")`` (the default) solves sum m(theta) + phi(theta) = 0;
``"plugin"`` fixes the corrections' weights at the plug-in solution and solves
sum m(theta) + phi(theta_plug) = 0. Both run here on the *same* cross-fitted first stage of
each replication (``orthoccp.first_stage`` with the replication's estimation seed, LightGBM,
5 folds: the design-family settings), so their difference is the weighting alone. Per
parameter: coverage, SD / mean s.e., bias / SD, and how often the interval checks flag.

Reproduce::

    python benchmarks/correction_weights.py --design F24 --reps 20
    python benchmarks/correction_weights.py --design ebike --units 1000 --periods 10 --reps 20

Writes ``benchmarks/results/correction_weights_<design>.json`` (resumable: stored
replications are kept and the run continues from the next one).
"""

from __future__ import annotations

import argparse
import json
import time
import warnings
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from orthoccp import __version__, estimate, first_stage
from orthoccp.montecarlo._replicate import replication_seeds
from orthoccp.simulate import family_design, scenario_names, simulate

RESULTS = Path(__file__).parent / "results"
WEIGHTS = ("solution", "plugin")
Z = 1.959963984540054  # the 97.5 % normal quantile (scipy.stats.norm.ppf(0.975))


def one(design: str, units: int, periods: int, rep: int) -> dict[str, Any]:
    sim_seed, est_seed = replication_seeds(0, rep)
    sim = simulate(design, units=units, periods=periods, seed=sim_seed)
    panel, model = sim.panel(), sim.model()
    fs = first_stage(panel, model, learner="lightgbm", folds=5, seed=est_seed)
    out: dict[str, Any] = {"rep": rep, "truth": {k: float(v) for k, v in sim.truth.items()}}
    for w in WEIGHTS:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            res = estimate(panel, model, nuisances=fs.nuisances, seed=est_seed,
                           correction_weights=w)
        t = res.interval_check.table
        out[w] = {"estimate": res.params.to_dict(), "std_error": res.std_errors.to_dict(),
                  "flagged": {k: bool(v) for k, v in t["flagged"].items()},
                  "unseen_variance": {k: float(v) for k, v in t["unseen_variance"].items()},
                  "route": ",".join(res.solve_routes)}
    return out


def summarise(rows: list[dict[str, Any]]) -> dict[str, Any]:
    names = list(rows[0]["truth"])
    out: dict[str, Any] = {}
    for w in WEIGHTS:
        out[w] = {}
        for p in names:
            truth = rows[0]["truth"][p]
            est = np.array([r[w]["estimate"][p] for r in rows])
            se = np.array([r[w]["std_error"][p] for r in rows])
            sd = float(est.std(ddof=1))
            out[w][p] = {
                "truth": truth,
                "coverage": float(np.mean(np.abs(est - truth) <= Z * se)),
                "sd_over_mean_se": sd / float(se.mean()),
                "bias_over_sd": float((est.mean() - truth) / sd),
                "rmse": float(np.sqrt(np.mean((est - truth) ** 2))),
                "flag_rate": float(np.mean([r[w]["flagged"][p] for r in rows])),
            }
        out[w]["fallbacks"] = int(sum(r[w]["route"] != "newton" for r in rows))
    return out


def main(argv: Sequence[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=(__doc__ or "").splitlines()[0])
    ap.add_argument("--design", default="F24", help="a family id or a scenario name")
    ap.add_argument("--reps", type=int, default=20)
    ap.add_argument("--units", type=int, default=None)
    ap.add_argument("--periods", type=int, default=None)
    ap.add_argument("--out", type=Path, default=None)
    a = ap.parse_args(argv)
    if a.design in scenario_names():
        units, periods = a.units or 1000, a.periods or 10
    else:
        d = family_design(a.design)
        units, periods = a.units or d.units, a.periods or d.periods
    out = a.out or RESULTS / f"correction_weights_{a.design}.json"
    doc: dict[str, Any] = (json.loads(out.read_text()) if out.exists() else
                           {"design": a.design, "units": units, "periods": periods,
                            "replications": []})
    if (doc["units"], doc["periods"]) != (units, periods):
        raise SystemExit(f"{out} holds N={doc['units']} T={doc['periods']}; use another --out.")
    t0 = time.perf_counter()
    for rep in range(len(doc["replications"]), a.reps):
        doc["replications"].append(one(a.design, units, periods, rep))
        doc["summary"] = summarise(doc["replications"])
        doc.update(reps=len(doc["replications"]), orthoccp_version=__version__,
                   command=f"python benchmarks/correction_weights.py --design {a.design} "
                           f"--units {units} --periods {periods} --reps {a.reps}")
        out.write_text(json.dumps(doc, indent=1) + "\n", encoding="utf-8")
        print(f"{a.design}: replication {rep + 1}/{a.reps} ({time.perf_counter() - t0:.0f} s)",
              flush=True)
    for w in WEIGHTS:
        print(w, json.dumps({p: {k: round(v, 2) for k, v in c.items()}
                             for p, c in doc["summary"][w].items() if isinstance(c, dict)}))
    print(f"wrote {out}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
