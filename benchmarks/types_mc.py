"""Monte Carlo of the finite-type estimator (orthoccp.types.estimate_types).

The design is :class:`orthoccp.types.TypesDesign`'s default: a renewal model with 10 states,
keep utility ``wear * x`` (wear -0.3), replace utility ``replace`` (-3.0) plus a type shift
(0 for type 1, 1.5 for type 2), shares 0.6 and 0.4, increments (0.3, 0.5, 0.2), discount 0.95,
each type's CCPs solved exactly. Each replication simulates ``--units`` units for ``--periods``
periods and estimates

* the two-type model by EM with model-updated CCPs polished to the mixture MLE
  (``estimate_types``, 3 starts, standard errors from unit-level scores with the transition
  noise), and
* the model that ignores the types (``orthoccp.discrete.estimate_discrete``, NPL, the MLE of a
  single type), to show the bias the types avoid.

Records per parameter the bias, SD, mean s.e., SD / mean s.e. and the coverage of the 95%
interval, and the replications whose type estimate failed or whose starts disagreed. Writes
``benchmarks/results/types_mc.json``. Reproduce::

    python benchmarks/types_mc.py --reps 200 --units 500 --periods 10
    python benchmarks/types_mc.py --reps 200 --units 500 --periods 10 --ccp-update data \\
        --out benchmarks/results/types_mc_data.json
    python benchmarks/types_mc.py --reps 200 --units 500 --periods 10 --share-covariate \\
        --out benchmarks/results/types_mc_covariate.json
"""

from __future__ import annotations

import argparse
import json
import time
import warnings
from pathlib import Path

import numpy as np

import orthoccp as oc
from orthoccp import EstimationError, OrthoCCPWarning, __version__
from orthoccp.types import TypesDesign, estimate_types, simulate_types

RESULTS = Path(__file__).parent / "results"
UTILITY = {"keep": {"wear": "x"}, "replace": {"replace": "1"}}


def _summary(theta: np.ndarray, se: np.ndarray, truth: np.ndarray, names: list[str]) -> dict:
    covers = np.abs(theta - truth) <= 1.959964 * se
    return {name: {"bias": float(theta[:, k].mean() - truth[k]),
                   "sd": float(theta[:, k].std(ddof=1)),
                   "mean_se": float(se[:, k].mean()),
                   "sd_over_se": float(theta[:, k].std(ddof=1) / se[:, k].mean()),
                   "coverage": float(covers[:, k].mean())}
            for k, name in enumerate(names)}


def _logit_covers(share: np.ndarray, se: np.ndarray, truth: float) -> np.ndarray:
    """Does the 95% interval built on the log-odds scale (delta method) cover the truth?"""
    lo = np.log(share / (1 - share))
    half = 1.959964 * se / (share * (1 - share))
    return np.abs(lo - np.log(truth / (1 - truth))) <= half


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--reps", type=int, default=200)
    ap.add_argument("--units", type=int, default=500)
    ap.add_argument("--periods", type=int, default=10)
    ap.add_argument("--ccp-update", choices=["model", "data"], default="model")
    ap.add_argument("--share-covariate", action="store_true",
                    help="types drawn 50/50 and a unit covariate z | type ~ N(-0.6 or 0.6, 1), "
                         "so P(type 2 | z) is logistic (intercept 0, slope 1.2); estimated "
                         "with share_covariates=['z']")
    ap.add_argument("--out", type=Path, default=RESULTS / "types_mc.json")
    a = ap.parse_args()
    design = TypesDesign(shares=(0.5, 0.5)) if a.share_covariate else TypesDesign()
    truth = design.truth
    extra: dict = {}
    if a.share_covariate:
        del truth["share:type2"]
        truth.update({"logodds:type2": 0.0, "logodds:type2:z": 1.2})
        extra = {"share_covariates": ["z"]}
    names = list(truth)
    rows: list[tuple[np.ndarray, np.ndarray]] = []
    ignore: list[tuple[np.ndarray, np.ndarray]] = []
    failed, disagreed = 0, 0
    t0 = time.perf_counter()
    for r in range(a.reps):
        df = simulate_types(design, units=a.units, periods=a.periods, seed=1000 + r)
        if a.share_covariate:
            kind = df.groupby("unit")["type"].first().to_numpy()
            z = np.random.default_rng(5000 + r).normal(np.where(kind == 2, 0.6, -0.6), 1.0)
            df["z"] = z[df["unit"].to_numpy()]
        panel = oc.Panel(df, unit="unit", period="period", choice="choice", states=["x"])
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", OrthoCCPWarning)
            try:
                res = estimate_types(panel, utility=UTILITY, discount=design.discount,
                                     type_shifts=["replace"], n_states=design.n_states,
                                     starts=3, seed=r, ccp_update=a.ccp_update, **extra)
            except EstimationError:
                failed += 1
            else:
                disagreed += int(res.details.starts_agreeing < res.details.starts
                                 - res.details.starts_failed)
                rows.append((res.params[names].to_numpy(), res.std_errors[names].to_numpy()))
            one = oc.discrete.estimate_discrete(panel, utility=UTILITY, discount=design.discount,
                                                n_states=design.n_states)
        ignore.append((one.params[["wear", "replace"]].to_numpy(),
                       one.std_errors[["wear", "replace"]].to_numpy()))
        if (r + 1) % 20 == 0:
            print(f"{r + 1}/{a.reps} replications ({time.perf_counter() - t0:.0f} s)", flush=True)
    theta, se = (np.array([x[k] for x in rows]) for k in (0, 1))
    out = {
        "orthoccp_version": __version__, "truth": truth,
        "design": ("TypesDesign(shares=(0.5, 0.5)), z | type ~ N(-0.6 or 0.6, 1)"
                   if a.share_covariate else "TypesDesign()"),
        "ccp_update": a.ccp_update,
        "units": a.units, "periods": a.periods, "reps": a.reps, "failed": failed,
        "starts_disagreed": disagreed, "seconds": time.perf_counter() - t0,
        "types": _summary(theta, se, np.array([truth[n] for n in names]), names),
        "share_logit_interval_coverage": None if a.share_covariate else float(np.mean(
            _logit_covers(theta[:, names.index("share:type2")],
                          se[:, names.index("share:type2")], truth["share:type2"]))),
        "replications": {"names": names, "estimates": theta.tolist(),
                         "std_errors": se.tolist()},
        "ignoring_types": _summary(np.array([x[0] for x in ignore]),
                                   np.array([x[1] for x in ignore]),
                                   np.array([truth["wear"], truth["replace"]]),
                                   ["wear", "replace"]),
    }
    a.out.parent.mkdir(parents=True, exist_ok=True)
    a.out.write_text(json.dumps(out, indent=1) + "\n")
    for block in ("types", "ignoring_types"):
        for name, s in out[block].items():
            print(f"{block:15s} {name:14s} bias {s['bias']:+.3f} sd/se {s['sd_over_se']:.2f} "
                  f"cov {s['coverage']:.3f}")
    if not a.share_covariate:
        print(f"share interval on the log-odds scale covers "
              f"{out['share_logit_interval_coverage']:.3f}")
    print(f"failed {failed}, starts disagreed {disagreed}; wrote {a.out}")


if __name__ == "__main__":
    main()
