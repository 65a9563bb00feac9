"""How well do the interval checks separate the cells whose debiased interval breaks?

Reads the design-family results (``benchmarks/results/design_family.json``, every
replication's interval-check signals) and, per parameter-design cell of the debiased estimator,
sets its coverage beside the share of replications whose interval checks flagged the parameter.
The design-family issue's targets for the diagnostic, with a cell *flagged* when the check
fires in at least half of its replications:

* it flags at least 80 % of the cells whose coverage is below 0.90 (``detected``), and
* fewer than 10 % of the cells whose coverage is 0.93 or above (``false_alarms``).

Besides the shipped rule (the ``flagged`` column each replication recorded), candidate rules
add the unseen variance of the CCP correction to the previous rule at several limits, or add
one recorded signal to the shipped rule: the correction's shift (``correction_shift`` above a limit) or
heavy-tailed unit scores (``effective_units`` below a limit). They are computed from the stored
signals, so trying a limit costs no estimation. A rule is chosen on the tuning designs only;
the evaluation designs judge it.

With 20 replications a cell's coverage has a Monte Carlo s.e. of about 0.05, so a cell with
true coverage 0.95 falls below 0.90 with probability of about 0.075 (binomial, 20 draws, 17 or
fewer covering): the table gives counts, not only rates.

Reproduce::

    python benchmarks/interval_calibration.py                 # all stored designs
    python benchmarks/interval_calibration.py --role tuning   # the tuning designs only

Writes ``benchmarks/results/interval_calibration.json``.
"""

from __future__ import annotations

import argparse
import json
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import pandas as pd

RESULTS = Path(__file__).parent / "results"
LOW, HIGH = 0.90, 0.93
"""Coverage below LOW must be flagged; coverage at HIGH or above must not (the issue's rates)."""
DETECT_TARGET, ALARM_TARGET = 0.80, 0.10

Rule = Callable[[pd.DataFrame], pd.Series]


def rules() -> dict[str, Rule]:
    """The shipped rule and the candidates, each mapping replication rows to a bool Series.

    ``previous`` is the rule before the unseen-variance signal (the flag each replication
    recorded before ``design_family.py --recheck``); the ``unseen_variance`` candidates add
    that signal to it at several limits, so that its limit is chosen here.
    """
    out: dict[str, Rule] = {"shipped": lambda r: r["flagged"],
                            "previous": lambda r: r["flagged_previous"]}
    for u in (0.5, 1.0, 2.0, 4.0):
        out[f"previous or unseen_variance > {u:g}"] = (
            lambda r, u=u: r["flagged_previous"] | (r["unseen_variance"] > u))
    for s in (2.0, 3.0, 4.0):
        out[f"shipped or correction_shift > {s:g}"] = (
            lambda r, s=s: r["flagged"] | (r["correction_shift"] > s))
    for e in (5.0, 10.0, 20.0):
        out[f"shipped or effective_units < {e:g}"] = (
            lambda r, e=e: r["flagged"] | (r["effective_units"] < e))
    return out


def debiased_rows(doc: dict[str, Any], role: str | None) -> pd.DataFrame:
    """Every debiased replication row of the stored designs, with its design key and role."""
    frames = []
    for key, entry in doc["designs"].items():
        if role is not None and entry.get("role") != role:
            continue
        r = pd.DataFrame(entry["mc"]["replications"])
        r = r[(r["estimator"] == "debiased") & ~r["failed"].astype(bool)].copy()
        r["design"] = key
        r["role"] = entry.get("role", "")
        frames.append(r)
    if not frames:
        raise SystemExit("interval_calibration.py: no stored design matches.")
    rows = pd.concat(frames, ignore_index=True)
    for col in ("linearity_gap", "correction_shift", "effective_units", "unseen_variance"):
        if col not in rows:
            rows[col] = float("nan")
        rows[col] = pd.to_numeric(rows[col], errors="coerce")
    rows["flagged"] = rows["flagged"].fillna(False).astype(bool)
    if "flagged_previous" not in rows:
        rows["flagged_previous"] = rows["flagged"]
    rows["flagged_previous"] = rows["flagged_previous"].fillna(rows["flagged"]).astype(bool)
    rows["covers"] = rows["covers"].astype(bool)
    return rows


def cells(rows: pd.DataFrame, rule: Rule) -> pd.DataFrame:
    """Per design and parameter: replications, coverage and the rule's flag rate."""
    rows = rows.assign(fires=rule(rows).fillna(False).astype(bool))
    out = (rows.groupby(["design", "parameter"], sort=False)
           .agg(reps=("covers", "size"), coverage=("covers", "mean"),
                flag_rate=("fires", "mean"))
           .reset_index())
    out["cell_flagged"] = out["flag_rate"] >= 0.5
    return out


def score(table: pd.DataFrame) -> dict[str, Any]:
    """Detection among cells below LOW and false alarms among cells at HIGH or above."""
    low = table[table["coverage"] < LOW]
    high = table[table["coverage"] >= HIGH]
    unflagged = table[~table["cell_flagged"]]
    return {
        "cells": int(len(table)),
        "low_cells": int(len(low)),
        "detected": int(low["cell_flagged"].sum()),
        "detection_rate": float(low["cell_flagged"].mean()) if len(low) else None,
        "high_cells": int(len(high)),
        "false_alarms": int(high["cell_flagged"].sum()),
        "false_alarm_rate": float(high["cell_flagged"].mean()) if len(high) else None,
        "unflagged_cells": int(len(unflagged)),
        "unflagged_pooled_coverage": (
            float((unflagged["coverage"] * unflagged["reps"]).sum() / unflagged["reps"].sum())
            if len(unflagged) else None),
    }


def main(argv: Sequence[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--results", type=Path, default=RESULTS / "design_family.json")
    p.add_argument("--role", choices=("tuning", "evaluation"), default=None)
    p.add_argument("--out", type=Path, default=RESULTS / "interval_calibration.json")
    a = p.parse_args(argv)
    doc = json.loads(a.results.read_text())
    rows = debiased_rows(doc, a.role)
    report: dict[str, Any] = {
        "source": str(a.results.name), "role": a.role or "all",
        "designs": sorted(rows["design"].unique().tolist()),
        "targets": {"low": LOW, "high": HIGH, "detect": DETECT_TARGET, "alarm": ALARM_TARGET},
        "rules": {},
    }
    for name, rule in rules().items():
        table = cells(rows, rule)
        report["rules"][name] = {"score": score(table), "cells": table.to_dict(orient="records")}
        s = report["rules"][name]["score"]
        print(f"{name:40s} detected {s['detected']}/{s['low_cells']} below {LOW}, "
              f"false alarms {s['false_alarms']}/{s['high_cells']} at {HIGH}+, "
              f"unflagged pooled coverage {s['unflagged_pooled_coverage']}")
    shipped = cells(rows, rules()["shipped"])
    print(shipped.to_string(index=False, float_format=lambda v: f"{v:.2f}"))
    a.out.write_text(json.dumps(report, indent=1) + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
