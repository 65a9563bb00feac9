"""Which Jacobian belongs in the sandwich of the renewal-robust moments: G or the ψ-Jacobian?

METHOD §6 uses G, the Jacobian of Σm, because E[∂φ/∂θ] = 0 at the truth. In finite samples
the Jacobian of Σψ = Σ(m + φ) can differ a lot from G, and the estimator's delta-method
sensitivity is the latter's inverse. This benchmark replicates the e-bike renewal scenario
(LightGBM first stage, renewal-robust moments, the orthoccp defaults) and records, per
replication, the estimate and three standard errors from the same influence terms:

* ``G``: the reported one, :math:`G^{-1}\\Omega G^{-1\\prime}`;
* ``psi_jacobian``: :math:`J_\\psi^{-1}\\Omega J_\\psi^{-1\\prime}` with the central-difference
  Jacobian of Σψ at the estimate;
* ``no_phi_P``: G with the CCP correction left out of Ω (what ignoring it would report).

It writes ``benchmarks/results/sandwich_jacobian.json`` with bias, SD, mean and median SE and
coverage of the 95 % interval (with its Monte Carlo standard error) per variant. Reproduce::

    python benchmarks/sandwich_jacobian.py --reps 40 --units 500
"""

from __future__ import annotations

import argparse
import importlib
import json
import os
import time
import warnings
from pathlib import Path

import numpy as np

os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

import orthoccp as oc  # noqa: E402
from orthoccp.solver import psi_jacobian  # noqa: E402
from orthoccp.simulate import simulate  # noqa: E402

_pipeline = importlib.import_module("orthoccp.estimate")
Z95 = 1.959963984540054


def _se(J: np.ndarray, pieces: dict[str, np.ndarray], units: np.ndarray) -> np.ndarray:
    psi = sum(pieces.values())
    uniq, inv = np.unique(units, return_inverse=True)
    S = np.zeros((uniq.size, psi.shape[1]))
    np.add.at(S, inv, psi)
    infl = S @ -np.linalg.inv(J).T
    n = uniq.size
    return np.sqrt(np.diag(n / (n - 1) * infl.T @ infl))


def one_rep(rep: int, units: int, periods: int) -> dict:
    """One replication: the estimate and the three standard errors."""
    captured: dict = {}
    solve = _pipeline.solve_orthogonal

    def spy(system, start, **kw):  # type: ignore[no-untyped-def]
        theta, info = solve(system, start, **kw)
        captured.update(system=system, theta=theta)
        return theta, info

    sim = simulate("ebike", units=units, periods=periods, seed=rep)
    panel = oc.Panel(sim.data, unit=sim.unit, period=sim.period, choice=sim.choice, states=list(sim.states))
    model = oc.Model(anchor=sim.anchor, kind=sim.kind, discount=sim.discount, utility=sim.utility,
                     persistent=sim.persistent)
    _pipeline.solve_orthogonal = spy
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            res = oc.estimate(panel, model, seed=rep)
    except oc.EstimationError as exc:
        return {"error": str(exc)}
    finally:
        _pipeline.solve_orthogonal = solve
    system, theta = captured["system"], captured["theta"]
    pieces = system.components(theta, debias=True)
    G = system.jacobian(theta)
    se_g = _se(G, pieces, system.units)
    assert np.allclose(se_g, res.std_errors.to_numpy(), rtol=1e-10)
    return {
        "truth": [float(v) for v in sim.truth.values()],
        "estimate": theta.tolist(),
        "G": se_g.tolist(),
        "psi_jacobian": _se(psi_jacobian(system, theta), pieces, system.units).tolist(),
        "no_phi_P": _se(G, {k: v for k, v in pieces.items() if k != "phi_P"}, system.units).tolist(),
        "moments": res.moments,
    }


def summarise(reps: list[dict], names: list[str]) -> dict:
    ok = [r for r in reps if "error" not in r]
    est = np.array([r["estimate"] for r in ok])
    truth = np.array(ok[0]["truth"])
    out: dict = {"replications": len(reps), "failures": len(reps) - len(ok)}
    for variant in ("G", "psi_jacobian", "no_phi_P"):
        se = np.array([r[variant] for r in ok])
        cover = np.abs(est - truth) <= Z95 * se
        out[variant] = {
            name: {
                "bias": float(est[:, k].mean() - truth[k]),
                "sd": float(est[:, k].std(ddof=1)),
                "mean_se": float(se[:, k].mean()),
                "median_se": float(np.median(se[:, k])),
                "coverage": float(cover[:, k].mean()),
                "coverage_mc_se": float(np.sqrt(0.95 * 0.05 / len(ok))),
            }
            for k, name in enumerate(names)
        }
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--reps", type=int, default=40)
    ap.add_argument("--units", type=int, default=500)
    ap.add_argument("--periods", type=int, default=12)
    ap.add_argument("--out", type=Path, default=Path(__file__).parent / "results" / "sandwich_jacobian.json")
    args = ap.parse_args()
    t0 = time.perf_counter()
    reps = []
    for rep in range(args.reps):
        reps.append(one_rep(rep, args.units, args.periods))
        print(f"replication {rep + 1}/{args.reps}", flush=True)
    names = list(simulate("ebike", units=2, periods=2, seed=0).truth)
    doc = {
        "design": {"scenario": "ebike", "units": args.units, "periods": args.periods,
                   "learner": "lightgbm", "folds": 5, "moments": "renewal_robust (default)",
                   "seeds": "simulation seed = estimation seed = replication index"},
        "summary": summarise(reps, names),
        "seconds": time.perf_counter() - t0,
        "orthoccp_version": oc.__version__,
        "replications": reps,
    }
    args.out.write_text(json.dumps(doc, indent=1) + "\n", encoding="utf-8")
    print(json.dumps(doc["summary"], indent=1))


if __name__ == "__main__":
    main()
