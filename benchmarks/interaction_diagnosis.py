"""Why the interaction slopes under-cover: the CCP correction at states where renewal is unseen.

On the design family the debiased interval of the main state x persistent covariate
interaction under-covers (F20 0.75, F24 0.55) while the oracle covers. This benchmark takes
the first stage out of the question: it gives the estimator the simulator's *exact* CCPs and
continuation values and compares, per replication,

* the linearised corrected moment at the truth, -G^{-1} sum(psi(theta_0)), whose spread the
  sandwich describes (SD over the mean s.e.);
* the solution of sum(psi) = 0 (what ``estimate`` reports) and the one-step estimate from the
  plug-in solution;
* on the rows that did not renew, binned by the true P_R at the next state: the mean of the
  CCP score (1{a' = R} - P_R(x')) / P_R(x') (conditional mean zero; -1 when none of the
  predicted renewals occur), the renewals seen against those expected, and the bin's sum of
  the correction in parameter units, sum_t o_t score_t with o_t = beta G^{-1}(A_a - Abar)_t
  (its median over replications: the typical shift the bin gives the estimate);
* the unseen-variance signal U_k of the interval checks for the learner's first stage on the
  first replications (LightGBM, the design-family settings).

Reproduce::

    python benchmarks/interaction_diagnosis.py --design F24 --reps 40 --learned 5

Writes ``benchmarks/results/interaction_diagnosis_<design>.json``.
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
import pandas as pd

from orthoccp import __version__, estimate
from orthoccp.montecarlo._replicate import replication_seeds
from orthoccp.simulate import family_design, simulate

RESULTS = Path(__file__).parent / "results"
BINS = (0.0, 1e-3, 1e-2, 1e-1, 1.0)
"""Bins of the true anchor probability at the next state."""


def _one(design: str, rep: int, learned: bool) -> dict[str, Any]:
    d = family_design(design)
    sim_seed, est_seed = replication_seeds(0, rep)
    sim = simulate(design, units=d.units, periods=d.periods, seed=sim_seed)
    panel, model = sim.panel(), sim.model()
    exact = sim.exact_nuisances(panel, model)
    names = list(model.bind(panel).parameters)
    truth = np.array([sim.truth[p] for p in names])
    out: dict[str, Any] = {"rep": rep}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        plug = estimate(panel, model, nuisances=exact, debias=False, moments="standard")
        deb = estimate(panel, model, nuisances=exact, moments="standard")
    pieces = deb.moment_pieces(1)
    system = pieces.system
    G = system.jacobian(truth)
    out["linearised"] = (truth - np.linalg.solve(G, pieces.psi(truth).sum(axis=0))).tolist()
    units = np.unique(system.units, return_inverse=True)[1]
    s = pd.DataFrame(pieces.psi(truth)).groupby(units).sum().to_numpy()
    Ginv = np.linalg.inv(G)
    out["linearised_se"] = np.sqrt(np.diag(Ginv @ (s.T @ s) @ Ginv.T)).tolist()
    tp = plug.params.to_numpy()
    out["one_step"] = (tp - np.linalg.solve(system.jacobian(tp), pieces.psi(tp).sum(axis=0))).tolist()
    out["solved"] = deb.params.tolist()
    out["solved_se"] = deb.std_errors.tolist()
    keep = (system.chosen != system.anchor) & system.corrected
    # theta units of each row's CCP correction (o_t score_t), summed within each bin
    o = system.discount * np.linalg.solve(G, system.correction_weight(truth).T).T
    out["bins"] = []
    for lo, hi in zip(BINS[:-1], BINS[1:]):
        mask = keep & (system.next_anchor_p >= lo) & (system.next_anchor_p < hi)
        out["bins"].append({
            "next_p": [lo, hi], "rows": int(mask.sum()),
            "mean_score": float(system.ccp_score[mask].mean()) if mask.any() else None,
            "renewals": int(np.sum(system.ccp_score[mask] > 0)),
            "expected_renewals": float(system.next_anchor_p[mask].sum()),
            "correction_sum": (o[mask] * system.ccp_score[mask, None]).sum(axis=0).tolist(),
        })
    if learned:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            res = estimate(panel, model, seed=est_seed, folds=5, learner="lightgbm")
        t = res.interval_check.table
        out["learned"] = {
            "estimate": res.params.tolist(), "std_error": res.std_errors.tolist(),
            "unseen_variance": t["unseen_variance"].tolist(), "flagged": t["flagged"].tolist(),
        }
    return out


def _spread(rows: list[dict[str, Any]], key: str, se_key: str, truth: np.ndarray,
            names: list[str]) -> dict[str, dict[str, float]]:
    est = np.array([r[key] for r in rows])
    se = np.array([r[se_key] for r in rows])
    z = (est - truth) / se
    return {p: {"sd_over_mean_se": float(est[:, k].std(ddof=1) / se[:, k].mean()),
                "corr_abs_error_se": float(np.corrcoef(np.abs(est[:, k] - truth[k]), se[:, k])[0, 1]),
                "coverage_below": float(np.mean(z[:, k] < -1.959964)),
                "coverage_above": float(np.mean(z[:, k] > 1.959964)),
                "coverage": float(np.mean(np.abs(z[:, k]) < 1.959964)),
                "bias_over_sd": float((est[:, k].mean() - truth[k]) / est[:, k].std(ddof=1))}
            for k, p in enumerate(names)}


def main(argv: Sequence[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=(__doc__ or "").splitlines()[0])
    ap.add_argument("--design", default="F24")
    ap.add_argument("--reps", type=int, default=40)
    ap.add_argument("--learned", type=int, default=5,
                    help="replications that also run the LightGBM first stage (default: 5)")
    ap.add_argument("--out", type=Path, default=None)
    a = ap.parse_args(argv)
    t0 = time.perf_counter()
    rows = []
    for rep in range(a.reps):
        rows.append(_one(a.design, rep, rep < a.learned))
        print(f"{a.design}: replication {rep + 1}/{a.reps}", flush=True)
    d = family_design(a.design)
    sim = simulate(a.design, units=50, periods=3, seed=0)
    names = list(sim.model().bind(sim.panel()).parameters)
    truth = np.array([d.truth[p] for p in names])
    summary = {
        "linearised_at_truth": _spread(rows, "linearised", "linearised_se", truth, names),
        "solved": _spread(rows, "solved", "solved_se", truth, names),
        "one_step": _spread(rows, "one_step", "solved_se", truth, names),
    }
    summary["bins"] = []
    for b, (lo, hi) in enumerate(zip(BINS[:-1], BINS[1:])):
        per = [r["bins"][b] for r in rows]
        sums = np.array([p["correction_sum"] for p in per])
        summary["bins"].append({
            "next_p": [lo, hi],
            "rows_per_rep": float(np.mean([p["rows"] for p in per])),
            "median_mean_score": float(np.median([p["mean_score"] for p in per
                                                  if p["mean_score"] is not None] or [np.nan])),
            "renewals_per_rep": float(np.mean([p["renewals"] for p in per])),
            "expected_renewals_per_rep": float(np.mean([p["expected_renewals"] for p in per])),
            "median_correction_sum": dict(zip(names, np.median(sums, axis=0).tolist())),
        })
    doc = {"design": a.design, "description": d.description, "parameters": names,
           "truth": truth.tolist(), "reps": a.reps, "bins": list(BINS), "summary": summary,
           "replications": rows, "seconds": time.perf_counter() - t0,
           "orthoccp_version": __version__,
           "command": f"python benchmarks/interaction_diagnosis.py --design {a.design} "
                      f"--reps {a.reps} --learned {a.learned}"}
    out = a.out or RESULTS / f"interaction_diagnosis_{a.design}.json"
    out.write_text(json.dumps(doc, indent=1) + "\n", encoding="utf-8")
    print(json.dumps(summary, indent=1))
    print(f"wrote {out}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
