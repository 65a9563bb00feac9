"""Summarise run_all.py's results.csv into benchmarks/results/outside_designs.json.

Per design and parameter: runs, failed runs, coverage of the debiased interval, SD across
draws over the mean standard error, plug-in mean, one-step fallbacks, and how many estimates
the interval checks flagged (with the coverage of the unflagged ones).

Usage: python summarize.py OUT_DIR [OUT_DIR ...] [--cd CSV] [--json PATH]

``--cd`` adds designs C and D from the runner in ``cd/`` (its results CSV, e.g.
``benchmarks/results/outside_designs_cd.csv``).
"""
import argparse
import json
import os

import pandas as pd

HERE = os.path.dirname(os.path.abspath(__file__))


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("out", nargs="+")
    ap.add_argument("--json", default=os.path.join(HERE, "..", "results", "outside_designs.json"))
    ap.add_argument("--cd", default=None, help="results CSV of cd/run_all.py")
    args = ap.parse_args()
    d = pd.concat([pd.read_csv(os.path.join(o, "results.csv")) for o in args.out])
    if args.cd:
        cd = pd.read_csv(args.cd)
        d = pd.concat([d, pd.DataFrame({
            "version": d["version"].iloc[0], "run": cd["design"] + "_s" + cd["seed"].astype(str),
            "design": cd["design"], "rep": cd["seed"], "kind": "default", "rc": cd["exit_code"],
            "param": cd["param"], "truth": cd["truth"], "estimate": cd["estimate"],
            "std_error": cd["std_error"], "covers": cd["covers"].astype(int),
            "plugin": cd["plugin"], "solution": cd["solution_summary"],
            "flagged": cd["flagged"].astype(int),
        })])
    d = d[d["kind"] == "default"]
    est = d[d["param"].notna()]
    cells = []
    for (design, param), g in est.groupby(["design", "param"], sort=False):
        flagged = g["flagged"].fillna(0).astype(bool)
        cells.append({
            "design": design, "parameter": param, "truth": float(g["truth"].iloc[0]),
            "runs": int(len(g)), "covered": int(g["covers"].sum()),
            "mean": float(g["estimate"].mean()), "sd": float(g["estimate"].std()),
            "mean_se": float(g["std_error"].mean()),
            "sd_over_se": float(g["estimate"].std() / g["std_error"].mean()),
            "plugin_mean": float(g["plugin"].mean()),
            "one_step": int(g["solution"].astype(str).str.contains("one-step").sum()),
            "flagged": int(flagged.sum()),
            "unflagged_covered": int(g.loc[~flagged, "covers"].sum()),
            "unflagged": int((~flagged).sum()),
        })
    failed = d[d["rc"] != 0]["run"].nunique()
    doc = {"version": str(d["version"].iloc[0]), "failed_runs": int(failed),
           "runs": int(d["run"].nunique()), "cells": cells}
    with open(args.json, "w") as fh:
        json.dump(doc, fh, indent=1)
    print(pd.DataFrame(cells).to_string())
    print("wrote", args.json)


if __name__ == "__main__":
    main()
