"""Rerun the first replications of stored coverage cells with today's code, on the same panels.

A change that should not move the estimator's distribution (a new fold key, a solver
fallback) still changes single estimates: the fold split differs. Rerunning a whole 200-rep
cell to show that nothing got worse costs hours; rerunning its first ``R`` replications on the
same simulated panels (a replication's panel depends on the run's seed and its index only) and
comparing them pair by pair costs minutes and is sharper: the panel noise cancels in the
differences.

Per parameter it reports the stored and the new debiased estimator over the same
replications (bias, SD, mean s.e., coverage) and the paired differences: mean and SD of the
new minus the stored estimate in units of the stored s.e., and the replications whose coverage
changed. Reproduce::

    python benchmarks/paired_rerun.py --reps 40 --cells "ebike|N=2000|lightgbm" \\
        "ebike3|N=2000|lightgbm" "producers|N=2000|lightgbm"

Writes ``benchmarks/results/paired_rerun.json``.
"""

from __future__ import annotations

import argparse
import json
import os
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402

from orthoccp import __version__  # noqa: E402
from orthoccp.montecarlo import run_montecarlo  # noqa: E402

RESULTS = Path(__file__).parent / "results"


def stored_cell(doc: dict[str, Any], key: str) -> tuple[dict[str, Any], pd.DataFrame]:
    """The cell's settings and its stored debiased replications."""
    cell = doc["cells"][key]
    reps = pd.DataFrame(cell["mc"]["replications"])
    return cell["mc"]["settings"], reps[reps["estimator"] == "debiased"]


def compare(old: pd.DataFrame, new: pd.DataFrame) -> list[dict[str, Any]]:
    """Per parameter: the two estimators over the same replications and their paired gaps."""
    m = old.merge(new, on=["rep", "parameter"], suffixes=("_old", "_new"))
    rows = []
    for param, g in m.groupby("parameter", sort=False):
        truth = float(g["truth_old"].iloc[0])
        row: dict[str, Any] = {"parameter": param, "truth": truth, "reps": int(len(g))}
        for tag in ("old", "new"):
            est = g[f"estimate_{tag}"].to_numpy(float)
            row[tag] = {
                "bias": float(est.mean() - truth),
                "sd": float(est.std(ddof=1)),
                "mean_se": float(g[f"std_error_{tag}"].mean()),
                "coverage": float(g[f"covers_{tag}"].astype(bool).mean()),
            }
        z = ((g["estimate_new"] - g["estimate_old"]) / g["std_error_old"]).to_numpy(float)
        row["shift_mean"] = float(z.mean())
        row["shift_sd"] = float(z.std(ddof=1))
        row["coverage_changed"] = int((g["covers_new"].astype(bool)
                                       != g["covers_old"].astype(bool)).sum())
        rows.append(row)
    return rows


def main(argv: Sequence[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--reps", type=int, default=40)
    p.add_argument("--cells", nargs="+", required=True)
    p.add_argument("--coverage", type=Path, default=RESULTS / "coverage.json")
    p.add_argument("--out", type=Path, default=RESULTS / "paired_rerun.json")
    a = p.parse_args(argv)
    doc = json.loads(a.coverage.read_text())
    out: dict[str, Any] = {"version": __version__, "reps": a.reps, "cells": {}}
    if a.out.exists():
        out["cells"] = json.loads(a.out.read_text()).get("cells", {})
    for key in a.cells:
        settings, old = stored_cell(doc, key)
        old = old[old["rep"] < a.reps]
        t0 = time.perf_counter()
        mc = run_montecarlo(
            settings["scenario"], reps=a.reps, units=settings["units"],
            periods=settings["periods"], learner=settings["learner"], folds=settings["folds"],
            seed=settings["seed"],
            moments=None if settings["moments"] == "auto" else settings["moments"], estimators=("debiased",),
            progress=False,
        )
        new = mc.replications
        new = new[new["estimator"] == "debiased"]
        same_panels = bool(np.array_equal(
            old.drop_duplicates("rep").sort_values("rep")["sim_seed"].to_numpy(),
            new.drop_duplicates("rep").sort_values("rep")["sim_seed"].to_numpy()))
        out["cells"][key] = {"same_panels": same_panels,
                             "seconds": time.perf_counter() - t0,
                             "parameters": compare(old, new)}
        print(json.dumps({key: out["cells"][key]}, indent=1), flush=True)
        a.out.write_text(json.dumps(out, indent=1) + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
