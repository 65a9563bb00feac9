"""Unit bootstrap against the sandwich standard errors of orthoccp.types.estimate_types.

One panel of :class:`orthoccp.types.TypesDesign`'s default design (``--units`` x ``--periods``,
simulation seed ``--sim-seed``), estimated once (5 starts), then ``--draws`` unit-bootstrap
draws (:func:`orthoccp.types.bootstrap_types`, warm starts) for each CCP update. Writes
``benchmarks/results/types_bootstrap.json``. Reproduce::

    python benchmarks/types_bootstrap.py --draws 199
"""

from __future__ import annotations

import argparse
import json
import time
from pathlib import Path

import orthoccp as oc
from orthoccp import __version__
from orthoccp.types import TypesDesign, bootstrap_types, estimate_types, simulate_types

RESULTS = Path(__file__).parent / "results"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--draws", type=int, default=199)
    ap.add_argument("--units", type=int, default=500)
    ap.add_argument("--periods", type=int, default=10)
    ap.add_argument("--sim-seed", type=int, default=1)
    ap.add_argument("--out", type=Path, default=RESULTS / "types_bootstrap.json")
    a = ap.parse_args()
    design = TypesDesign()
    df = simulate_types(design, units=a.units, periods=a.periods, seed=a.sim_seed)
    panel = oc.Panel(df, unit="unit", period="period", choice="choice", states=["x"])
    out: dict = {"orthoccp_version": __version__, "design": "TypesDesign()", "units": a.units,
                 "periods": a.periods, "sim_seed": a.sim_seed, "draws": a.draws, "updates": {}}
    for update in ("model", "data"):
        opts = dict(utility={"keep": {"wear": "x"}, "replace": {"replace": "1"}},
                    discount=design.discount, type_shifts=["replace"],
                    n_states=design.n_states, ccp_update=update)
        t0 = time.perf_counter()
        res = estimate_types(panel, **opts)
        boot = bootstrap_types(res, panel, draws=a.draws, seed=0, **opts)
        out["updates"][update] = {
            "failed": boot.failed, "seconds": time.perf_counter() - t0,
            "table": {str(k): {c: float(v) for c, v in row.items()}
                      for k, row in boot.table.iterrows()}}
        print(update, boot, sep="\n", flush=True)
    a.out.parent.mkdir(parents=True, exist_ok=True)
    a.out.write_text(json.dumps(out, indent=1) + "\n")
    print(f"wrote {a.out}")


if __name__ == "__main__":
    main()
