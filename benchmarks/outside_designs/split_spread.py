"""How much the fold split moves the estimates on the outside designs (issue: split noise).

Runs ``orthoccp.estimate`` with ``splits=S`` (default 3) on the first draws of each outside
design with the spec's options and records, per parameter, the standard deviation of the
per-split estimates over the reported standard error (``Results.split_spread``).

Usage: python split_spread.py [--draws 5] [--splits 3] [--json PATH]
Writes benchmarks/results/outside_split_spread.json.
"""
import argparse
import json
import os
import sys
import time
import warnings

HERE = os.path.dirname(os.path.abspath(__file__))
DATA = os.path.join(HERE, "data")


def main() -> None:
    import orthoccp as oc
    from orthoccp.spec import read_spec

    ap = argparse.ArgumentParser()
    ap.add_argument("--draws", type=int, default=5)
    ap.add_argument("--splits", type=int, default=3)
    ap.add_argument("--designs", default="A,B")
    ap.add_argument("--json", default=os.path.join(HERE, "..", "results", "outside_split_spread.json"))
    args = ap.parse_args()
    rows = []
    for design in args.designs.split(","):
        for r in range(args.draws):
            spec = read_spec(os.path.join(DATA, f"{design}_{r}.toml"))
            panel = spec.build_panel(spec.load_data(os.path.join(DATA, f"{design}_{r}.csv")))
            model = spec.build_model(panel)
            options = spec.estimate_options()
            options["splits"] = args.splits
            t0 = time.perf_counter()
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                res = oc.estimate(panel, model, **options)
            spread = res.split_spread
            for name in res.params.index:
                rows.append({"design": design, "draw": r, "parameter": str(name),
                             "split_spread": float(spread[name]),
                             "std_error": float(res.std_errors[name]),
                             "routes": list(res.solve_routes),
                             "seconds": time.perf_counter() - t0})
            print(design, r, spread.round(3).to_dict(), res.solve_routes, flush=True)
    with open(args.json, "w") as fh:
        json.dump({"splits": args.splits, "version": oc.__version__, "rows": rows}, fh, indent=1)
    print("wrote", args.json)


if __name__ == "__main__":
    sys.exit(main())
