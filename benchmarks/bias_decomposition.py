"""Where the debiased estimator's remaining bias comes from: a second-order decomposition.

The corrected moment ψ = m + φ_μ + φ_P is Neyman-orthogonal: first-order errors in the CCP
P and the continuation expectations μ leave E[ψ] unchanged. What is left are second-order
terms, and this benchmark measures them one by one on the headline panels of
``benchmarks/coverage.py`` (same seeds, so the same simulated panels and the same cross-fitted
nuisances as the stored debiased estimates; the script checks that it reproduces them).

On each panel, at the true θ0 and with G = ∂Σm/∂θ' at the learner's nuisances, the
one-step linearisation of the debiased estimate is θ̂ - θ0 ≈ -G⁻¹ Σψ(θ0; P̂, μ̂). It splits
exactly into

* ``sampling``: -G⁻¹ Σψ(θ0; P0, μ0), the moment at the exact nuisances (mean zero);
* ``ccp``: -G⁻¹ [Σψ(θ0; P̂, μ0) - Σψ(θ0; P0, μ0)], the learner's CCP error alone;
* ``mu``: -G⁻¹ [Σψ(θ0; P0, μ̂) - Σψ(θ0; P0, μ0)], the continuation regressions' error alone;
* ``interaction``: the rest (the product of the two errors). It and ``mu`` are strongly
  negatively correlated across panels, so the summary also gives their sum
  (``mu_and_interaction``), whose mean is far better determined than either's.

The CCP enters ψ only through ln P_R(x') (in the regression target q) and the correction
(1{a' = R} - P_R(x'))/P_R(x'). With r = P̂_R(x') / P_R(x'), the change of the row's bracket
averaged over the next choice a' is ln r + 1/r - 1 (the first-order terms of the logarithm
and the correction cancel): never negative, about (r - 1)²/2 near r = 1. So the ``ccp``
term has a one-signed mean, β Σ_rows (A_a - Ā)(ln r + 1/r - 1) mapped through -G⁻¹
(``ccp_expected``: the same quantity from this formula, without the noise of the realised
a'). It is a mean of non-negative terms, so it does not average out over rows; it is of the
order of the learner's relative error at the next states.

Writes ``benchmarks/results/bias_decomposition.json``. Reproduce with::

    python benchmarks/bias_decomposition.py --scenario producers --reps 200 --jobs 2

``--classifier-params '{"reg_lambda": 0}'`` changes settings of the CCP classifier (the
estimates are then paired with the stored default ones instead of checked against them).
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from dataclasses import replace
from pathlib import Path
from typing import Any

os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

import numpy as np  # noqa: E402
from coverage import FOLDS, PERIODS, RESULTS, SEED, cell_key  # noqa: E402
from joblib import Parallel, delayed  # noqa: E402

import orthoccp as oc  # noqa: E402
from orthoccp.backends import resolve_backend  # noqa: E402
from orthoccp.estimate import account_rows  # noqa: E402
from orthoccp.folds import unit_folds  # noqa: E402
from orthoccp.learners import resolve_learners  # noqa: E402
from orthoccp.moments import build_moment_system  # noqa: E402
from orthoccp.montecarlo import replication_seeds  # noqa: E402
from orthoccp.montecarlo._replicate import _single_threaded  # noqa: E402
from orthoccp.nuisance import crossfit_nuisances, nuisances_from_truth  # noqa: E402
from orthoccp.simulate import simulate  # noqa: E402

OUT = RESULTS / "bias_decomposition.json"
PARTS = ("sampling", "ccp", "mu", "interaction")


def one_rep(scenario: str, units: int, learner: str, rep: int,
            classifier_params: dict[str, Any] | None = None) -> dict[str, Any]:
    """The decomposition on replication ``rep`` of the coverage cell (with the classifier's
    settings changed by ``classifier_params``, if given)."""
    sim_seed, est_seed = replication_seeds(SEED, rep)
    sim = simulate(scenario, units=units, periods=PERIODS, seed=sim_seed)
    panel = oc.Panel(sim.data, unit=sim.unit, period=sim.period, choice=sim.choice,
                     states=list(sim.states))
    model = oc.Model(anchor=sim.anchor, kind=sim.kind, discount=sim.discount,
                     utility=dict(sim.utility), persistent=tuple(sim.persistent or ()))
    bound = model.bind(panel)
    if model.kind != "terminal":
        sys.exit("bias_decomposition.py: only terminal scenarios (the standard moment) are "
                 "decomposed; renewal scenarios use renewal-robust moments by default.")
    pair = resolve_learners(learner)
    pair = replace(pair, classifier=_single_threaded(pair.classifier),
                   regressor=_single_threaded(pair.regressor))
    if classifier_params:
        pair.classifier.set_params(**classifier_params)
    # the first stage exactly as estimate() draws it: folds, then the fits, from one rng
    rng = np.random.default_rng(est_seed)
    folds = unit_folds(panel.unit_codes, FOLDS, rng, unit_keys=panel.unit_keys)
    hat = crossfit_nuisances(bound, pair, folds, rng, scheme="nested", clip=1e-4,
                             anchor_features=None, backend=resolve_backend(None, None))
    res = oc.estimate(panel, model, nuisances=hat, debias=True, moments="standard",
                      small_sample=True)
    ratio_se = dict(zip(bound.parameters, res.std_errors.to_numpy().tolist()))
    order = [list(sim.choices).index(c) for c in panel.choices]
    truth = nuisances_from_truth(bound, sim.ccp[:, order], sim.continuation[:, order])
    theta0 = np.array([sim.truth[p] for p in bound.parameters])
    rows, corrected, _ = account_rows(bound)

    def total(nuis: Any) -> np.ndarray:
        system = build_moment_system(bound, nuis, rows, corrected)
        return system.moment(theta0, debias=True).sum(axis=0)

    sys_hat = build_moment_system(bound, hat, rows, corrected)
    Ginv = np.linalg.inv(sys_hat.jacobian(theta0))
    s_hat, s0 = total(hat), total(truth)
    s_ccp = total(replace(truth, ccp=hat.ccp, clipped_rows=hat.clipped_rows))
    s_mu = total(replace(truth, mu=hat.mu))
    parts = {
        "sampling": -Ginv @ s0,
        "ccp": -Ginv @ (s_ccp - s0),
        "mu": -Ginv @ (s_mu - s0),
        "interaction": -Ginv @ (s_hat - s_ccp - s_mu + s0),
    }
    # the ccp term averaged over the next choice: beta * (A_a - Abar) * (ln r + 1/r - 1) per row
    sys0 = build_moment_system(bound, truth, rows, corrected)
    lam = sys0.probabilities(theta0)
    own = sys0._centre(lam, sys0.W)[np.arange(sys0.n_rows), sys0.chosen]
    nxt = panel.next_row[rows]
    use = sys0.corrected
    R = bound.anchor_index
    P0 = truth.ccp[nxt[use], R]
    ratio = hat.ccp[nxt[use], R] / P0
    gap = np.log(ratio) + 1.0 / ratio - 1.0
    expected = model.discount * (own[use] * gap[:, None]).sum(axis=0)
    names = list(bound.parameters)
    return {
        "rep": rep, "sim_seed": sim_seed, "est_seed": est_seed,
        "debiased": dict(zip(names, res.params.to_numpy().tolist())),
        "std_error": ratio_se,
        "linearised": dict(zip(names, (theta0 + sum(parts.values())).tolist())),
        **{k: dict(zip(names, v.tolist())) for k, v in parts.items()},
        "ccp_expected": dict(zip(names, (-Ginv @ expected).tolist())),
        "next_state_mean_gap": float(np.mean(gap)),
        "next_state_median_log_ratio": float(np.median(np.log(ratio))),
        "next_state_share_off_by_2x": float(np.mean((ratio > 2) | (ratio < 0.5))),
        "median_next_anchor_probability": float(np.median(P0)),
    }


def summarise(reps: list[dict[str, Any]], truth: dict[str, float]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for p, t in truth.items():
        est = np.array([r["debiased"][p] for r in reps])
        sd = float(est.std(ddof=1))
        row: dict[str, Any] = {"truth": t, "sd": sd, "bias": float(est.mean() - t),
                               "bias_mcse": sd / np.sqrt(est.size)}
        row["bias_over_sd"] = row["bias"] / sd
        se = np.array([r["std_error"][p] for r in reps])
        row["mean_se"] = float(se.mean())
        row["sd_over_mean_se"] = sd / float(se.mean())
        row["coverage"] = float(np.mean(np.abs(est - t) <= 1.959963984540054 * se))
        lin = np.array([r["linearised"][p] for r in reps])
        row["linearised_bias"] = float(lin.mean() - t)
        row["linearisation_error_median_abs"] = float(np.median(np.abs(lin - est)))
        for k in (*PARTS, "mu_and_interaction", "ccp_expected"):
            if k == "mu_and_interaction":  # the two are strongly negatively correlated
                v = np.array([r["mu"][p] + r["interaction"][p] for r in reps])
            else:
                v = np.array([r[k][p] for r in reps])
            row[k] = {"mean": float(v.mean()), "mcse": float(v.std(ddof=1) / np.sqrt(v.size)),
                      "mean_over_sd": float(v.mean() / sd), "sd": float(v.std(ddof=1))}
        out[p] = row
    for k in ("next_state_mean_gap", "next_state_median_log_ratio", "next_state_share_off_by_2x",
              "median_next_anchor_probability"):
        out[k] = float(np.median([r[k] for r in reps]))
    return out


def paired_with_stored(reps: list[dict[str, Any]], key: str) -> dict[str, Any] | None:
    """These debiased estimates minus coverage.json's on the same panels: the largest gap, and
    per parameter the mean difference with its standard error."""
    path = RESULTS / "coverage.json"
    if not path.exists():
        return None
    cell = json.loads(path.read_text())["cells"].get(key)
    if cell is None:
        return None
    stored = {(r["rep"], r["parameter"]): r["estimate"] for r in cell["mc"]["replications"]
              if r["estimator"] == "debiased" and not r["failed"]}
    out: dict[str, Any] = {"max_abs_gap": 0.0}
    for p in reps[0]["debiased"]:
        d = np.array([r["debiased"][p] - stored[(r["rep"], p)] for r in reps
                      if (r["rep"], p) in stored])
        if d.size == 0:
            return None
        out["max_abs_gap"] = max(out["max_abs_gap"], float(np.abs(d).max()))
        out[p] = {"mean_difference": float(d.mean()),
                  "se": float(d.std(ddof=1) / np.sqrt(d.size)) if d.size > 1 else float("nan")}
    return out


def main(argv: list[str] | None = None) -> dict[str, Any]:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--scenario", default="producers")
    ap.add_argument("--units", type=int, default=2000)
    ap.add_argument("--learner", default="lightgbm")
    ap.add_argument("--reps", type=int, default=200)
    ap.add_argument("--jobs", type=int, default=1)
    ap.add_argument("--classifier-params", type=json.loads, default=None,
                    help='JSON settings of the classifier to change, e.g. \'{"reg_lambda": 0}\'')
    ap.add_argument("--out", type=Path, default=OUT)
    args = ap.parse_args(argv)
    t0 = time.perf_counter()
    reps = Parallel(n_jobs=args.jobs, verbose=5)(
        delayed(one_rep)(args.scenario, args.units, args.learner, r, args.classifier_params)
        for r in range(args.reps))
    reps = sorted(reps, key=lambda r: r["rep"])
    truth = simulate(args.scenario, units=1, periods=1, seed=0).truth
    key = cell_key(args.scenario, args.units, args.learner)
    paired = paired_with_stored(reps, key)
    if not args.classifier_params and paired is not None and paired["max_abs_gap"] > 1e-8:
        sys.exit(f"bias_decomposition.py: the debiased estimates differ from coverage.json's "
                 f"cell {key} by up to {paired['max_abs_gap']:.3g}; the first stage was not "
                 f"reproduced.")
    result = {
        "config": {"scenario": args.scenario, "units": args.units, "periods": PERIODS,
                   "learner": args.learner, "classifier_params": args.classifier_params,
                   "folds": FOLDS, "seed": SEED, "reps": args.reps, "coverage_cell": key,
                   "orthoccp": oc.__version__, "wall_seconds": time.perf_counter() - t0},
        "paired_with_stored_debiased": paired,
        "summary": summarise(reps, dict(truth)),
        "replications": reps,
    }
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(json.dumps(result, indent=1))
    for p, row in result["summary"].items():
        if not isinstance(row, dict):
            print(f"{p}: {row:.4g}")
            continue
        print(f"{p}: bias {row['bias']:+.4f} ({row['bias_over_sd']:+.2f} SD), SD/mean s.e. "
              f"{row['sd_over_mean_se']:.2f}, coverage {row['coverage']:.3f}, linearised "
              f"{row['linearised_bias']:+.4f}; " + ", ".join(
                  f"{k} {row[k]['mean']:+.4f} ({row[k]['mean_over_sd']:+.2f} SD)"
                  for k in (*PARTS, "mu_and_interaction", "ccp_expected")))
    if paired is not None:
        print("paired with the stored debiased estimates:", json.dumps(paired))
    return result


if __name__ == "__main__":
    main()
