"""Design-family benchmark: plug-in vs debiased vs oracle on random designs we did not write.

Each design is a draw of :func:`orthoccp.simulate.family_design` (renewal and terminal, 2-4
choices, 5-50 covariates, exogenous Markov covariates, scrap values, rare to common anchors),
replicated with :func:`orthoccp.montecarlo.run_montecarlo` at the design's own size (N, T) and
default estimation options (LightGBM first stage, 5 folds, ``estimate``'s default moments).

Tuning designs. :data:`TUNING` is the literal table of the 12 designs on which defaults and
diagnostics may be tuned, committed before any estimator change. They were picked by their
characteristics only (no estimate was looked at) so that together they span both kinds, 2-4
choices, 0-2 exogenous covariates, 5-46 covariates, N 500-3,050, T 6-20, discount
0.905-0.973, anchor shares 0.02-0.15 and scrap values on a persistent or a time-varying
covariate.

Evaluation designs. ``--evaluation --draw-seed S`` draws 8 design seeds from 1000-9999 with
``numpy.random.default_rng(S)`` (a range no tuning design uses), stores them in the results
file and runs them. Draw them only once the defaults and diagnostics are frozen; the targets
of the design-family issue are judged on them.

Per design and parameter the results keep every replication (``mc``) and a summary per
estimator: failed solves, bias, SD, bias/SD, mean s.e., SD/mean s.e., RMSE and coverage.

Resumable like ``coverage.py``: each design is stored in ``benchmarks/results/
design_family.json`` under its key (``F05|N=500|T=20|lightgbm``) after every
``--checkpoint`` replications; a rerun continues partial designs and skips finished ones (a
larger ``--reps`` extends them). Learners run single-threaded; ``--jobs`` workers use
``--jobs`` cores. Reproduce, e.g.::

    python benchmarks/design_family.py --reps 20                 # screen the tuning designs
    python benchmarks/design_family.py --reps 50                 # confirm (extends them)
    python benchmarks/design_family.py --reps 2 --designs F05 F08 --units 300 --periods 6 \\
        --results /tmp/design_family_check.json                  # a quick end-to-end check
    python benchmarks/design_family.py --evaluation --draw-seed S --reps 50
    python benchmarks/design_family.py --table-only
"""

from __future__ import annotations

import argparse
import importlib.util
import math
import os
import sys
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

# LightGBM's OpenMP threads spin while waiting unless told otherwise (see orthoccp.cli.main).
os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

from orthoccp.montecarlo import MonteCarloResults, run_montecarlo  # noqa: E402
from orthoccp.simulate import family_design, family_id  # noqa: E402

# The storage helpers (atomic save, one-writer lock) of the coverage benchmark. Loaded by path:
# the file's module name would clash with the `coverage` package.
_spec = importlib.util.spec_from_file_location(
    "coverage_benchmark", Path(__file__).with_name("coverage.py")
)
assert _spec is not None and _spec.loader is not None
_coverage = importlib.util.module_from_spec(_spec)
_spec.loader.exec_module(_coverage)
load, save, lock, stored_results = (
    _coverage.load, _coverage.save, _coverage.lock, _coverage.stored_results
)

#: The 12 tuning designs: (id, design seed). Committed before any estimator change.
TUNING: tuple[tuple[str, int], ...] = (
    ("F01", 1),   # terminal, 4 choices, no exogenous covariate, rare exit
    ("F03", 3),   # terminal, 2 choices, 40 covariates, one exogenous chain
    ("F05", 5),   # renewal, 4 choices, 5 covariates, two exogenous chains, N=500 T=20
    ("F07", 7),   # terminal, 2 choices, N=3050 T=19, rare exit
    ("F08", 8),   # terminal, 3 choices, T=6, scrap value on the exogenous covariate
    ("F09", 9),   # renewal, 2 choices, 37 covariates, one exogenous chain
    ("F11", 11),  # terminal, 3 choices, two exogenous chains, scrap value on e0
    ("F15", 15),  # renewal, 2 choices, common renewal, beta=0.969
    ("F17", 17),  # terminal, 4 choices, N=2700, common exit, beta=0.901
    ("F20", 20),  # renewal, 3 choices, 46 covariates, no exogenous covariate, beta=0.973
    ("F24", 24),  # renewal, 4 choices, T=19, common renewal
    ("F36", 36),  # renewal, 2 choices, N=2950, rare renewal, beta=0.905
)
EVALUATION_SIZE = 8
EVALUATION_RANGE = (1000, 10000)
LEARNER = "lightgbm"
FOLDS = 5
SEED = 0
ESTIMATORS = ("naive", "debiased", "oracle")
RESULTS = Path(__file__).parent / "results"


def evaluation_designs(draw_seed: int) -> list[tuple[str, int]]:
    """The 8 evaluation designs drawn with ``draw_seed`` from seeds 1000-9999."""
    import numpy as np

    rng = np.random.default_rng(draw_seed)
    seeds = rng.choice(np.arange(*EVALUATION_RANGE), size=EVALUATION_SIZE, replace=False)
    return [(family_id(int(s)), int(s)) for s in sorted(seeds)]


def design_key(design_id: str, units: int, periods: int, learner: str) -> str:
    """The key of a design in ``design_family.json``, e.g. ``"F05|N=500|T=20|lightgbm"``."""
    return f"{design_id}|N={units}|T={periods}|{learner}"


def _number(value: Any) -> float | None:
    if value is None:
        return None
    value = float(value)
    return None if math.isnan(value) else value


def summarise(mc: MonteCarloResults) -> list[dict[str, Any]]:
    """Per estimator and parameter: failed solves, bias, SD, bias/SD, mean s.e., SD/mean s.e.,
    RMSE and coverage (with its Monte Carlo s.e.), the fallback solves (root-finder or
    one-step) and their coverage, and the replications whose interval checks flagged the
    parameter with the coverage of the others, as plain JSON values."""
    rows = []
    for r in mc.summary.to_dict(orient="records"):
        bias, sd = _number(r["bias"]), _number(r["sd"])
        rows.append(
            {
                "estimator": r["estimator"],
                "parameter": r["parameter"],
                "truth": float(r["truth"]),
                "reps": int(r["reps"]),
                "failures": int(r["failures"]),
                "bias": bias,
                "sd": sd,
                "bias_over_sd": None if bias is None or not sd else bias / sd,
                "mean_se": _number(r["mean_se"]),
                "sd_over_se": _number(r["sd_over_se"]),
                "rmse": _number(r["rmse"]),
                "coverage": _number(r["coverage"]),
                "coverage_mcse": _number(r["coverage_mcse"]),
                "moments": r["moments"] or "",
                "fallbacks": int(r["fallbacks"]),
                "fallback_coverage": _number(r["fallback_coverage"]),
                "flagged": int(r["flagged"]),
                "unflagged_coverage": _number(r["unflagged_coverage"]),
            }
        )
    return rows


# --------------------------------------------------------------------------- one design
def run_design(
    doc: dict[str, Any],
    path: Path,
    *,
    design_id: str,
    role: str,
    reps: int,
    jobs: int,
    checkpoint: int,
    units: int | None,
    periods: int | None,
) -> str:
    """Bring one design to ``reps`` replications, saving after every ``checkpoint``."""
    design = family_design(design_id)
    n = design.units if units is None else units
    T = design.periods if periods is None else periods
    key = design_key(design.id, n, T, LEARNER)
    entry = doc["designs"].get(key)
    done = stored_results(entry)
    have = 0 if done is None else done.reps
    if done is not None and set(done.replications["rep"].unique()) != set(range(have)):
        sys.exit(f"design_family.py: {key} holds non-contiguous replications; delete it.")
    if have >= reps:
        print(f"{key}: finished ({have} replications), skipped", flush=True)
        return "skipped"
    t0 = time.perf_counter()
    print(f"{key}: {design.description}\n{key}: {have} of {reps} stored, running the rest",
          flush=True)
    while have < reps:
        step = min(checkpoint, reps - have)
        part = run_montecarlo(
            design.id, reps=step, first_rep=have, units=n, periods=T, learner=LEARNER,
            folds=FOLDS, seed=SEED, jobs=jobs, estimators=ESTIMATORS, progress=False,
        )
        if done is not None and part.settings != done.settings:
            sys.exit(f"design_family.py: {key} was stored with other settings "
                     f"({done.settings}); delete it from {path} to rerun it.")
        done = part if done is None else MonteCarloResults.concat([done, part])
        have = done.reps
        doc["designs"][key] = {
            "id": design.id,
            "seed": design.seed,
            "role": role,
            "description": design.description,
            "kind": design.kind,
            "choices": list(design.choices),
            "units": n,
            "periods": T,
            "design_units": design.units,
            "design_periods": design.periods,
            "discount": design.discount,
            "truth": dict(design.truth),
            "calibration": dict(design.calibration),
            "learner": LEARNER,
            "folds": FOLDS,
            "seed_mc": SEED,
            "target_reps": reps,
            "status": "finished" if have >= reps else "partial",
            "summary": summarise(done),
            "mc": done.to_dict(),
        }
        save(path, doc)
        fails = ", ".join(f"{k} {v}" for k, v in done.failures.items() if v) or "none"
        print(f"{key}: {have}/{reps} replications ({time.perf_counter() - t0:.0f} s this run; "
              f"failed solves: {fails})", flush=True)
    return "ran"


# --------------------------------------------------------------------------- recheck
SIGNAL_COLUMNS = ("linearity_gap", "correction_shift", "effective_units", "unseen_variance",
                  "flagged")


def recheck_design(doc: dict[str, Any], path: Path, key: str, *, checkpoint: int) -> int:
    """Rerun the debiased estimator of every stored replication of ``key`` and store the
    current interval-check signals and flag in place of the old ones (the old flag is kept
    as ``flagged_previous``, for :mod:`interval_calibration`'s candidate rules).

    The estimate is deterministic in the replication's seeds, so it must reproduce the stored
    one (to 1e-8 relative); the run stops otherwise. Replications that already hold every
    signal are skipped, so the recheck resumes. Returns the number of replications rerun.
    Replications stored before the named random streams (orthoccp 0.1 after fb751a4 changed
    every fold split and learner seed) do not reproduce, so the recheck stops on them: run
    the design afresh instead.
    """
    from dataclasses import replace

    from orthoccp.montecarlo._replicate import run_replication

    entry = doc["designs"][key]
    records = entry["mc"]["replications"]
    settings = replace(MonteCarloResults.from_dict(entry["mc"]).settings,
                       estimators=("debiased",))
    todo = sorted({r["rep"] for r in records if r["estimator"] == "debiased"
                   and r.get("unseen_variance") is None and not r["failed"]})
    t0 = time.perf_counter()
    for i, rep in enumerate(todo, 1):
        new = {r["parameter"]: r for r in run_replication(settings, rep)}
        for r in records:
            if r["estimator"] != "debiased" or r["rep"] != rep:
                continue
            fresh = new[r["parameter"]]
            if not math.isclose(fresh["estimate"], r["estimate"], rel_tol=1e-8, abs_tol=1e-12):
                sys.exit(f"design_family.py: {key} replication {rep} {r['parameter']}: the "
                         f"rerun gives {fresh['estimate']!r}, the store {r['estimate']!r}; the "
                         f"estimator changed, so rerun the design instead.")
            r.setdefault("flagged_previous", r["flagged"])  # the rule before the recheck
            for col in SIGNAL_COLUMNS:
                value = fresh[col]
                r[col] = None if isinstance(value, float) and math.isnan(value) else value
        if i % checkpoint == 0 or i == len(todo):
            entry["summary"] = summarise(MonteCarloResults.from_dict(entry["mc"]))
            save(path, doc)
            print(f"{key}: rechecked {i}/{len(todo)} ({time.perf_counter() - t0:.0f} s)",
                  flush=True)
    return len(todo)


# --------------------------------------------------------------------------- report
def _fmt(value: Any, spec: str) -> str:
    return "–" if value is None else format(value, spec)


def markdown(doc: dict[str, Any]) -> str:
    """One line per design, estimator and parameter of the stored designs."""
    lines = [
        "# Design-family benchmark",
        "",
        f"Written by `benchmarks/design_family.py` (orthoccp {doc.get('orthoccp_version', '?')}, "
        f"updated {doc.get('updated', '?')}). LightGBM first stage, {FOLDS} folds, default "
        "moments; plug-in, debiased and oracle (exact nuisances) on the same panels.",
        "",
        "| design | role | N | T | reps | estimator | parameter | truth | failed | bias/SD | "
        "SD/SE | RMSE | coverage | fallbacks | flagged | unflagged coverage |",
        "|---|---|---:|---:|---:|---|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|",
    ]
    for key, e in sorted(doc.get("designs", {}).items()):
        for r in e["summary"]:
            lines.append(
                f"| {e['id']} | {e['role']} | {e['units']} | {e['periods']} | {r['reps']} | "
                f"{r['estimator']} | {r['parameter']} | {r['truth']:.3g} | {r['failures']} | "
                f"{_fmt(r['bias_over_sd'], '.2f')} | {_fmt(r['sd_over_se'], '.2f')} | "
                f"{_fmt(r['rmse'], '.3f')} | {_fmt(r['coverage'], '.2f')} | "
                f"{r.get('fallbacks', '-')} | {r.get('flagged', '-')} | "
                f"{_fmt(r.get('unflagged_coverage'), '.2f')} |"
            )
    lines += ["", "Designs:", ""]
    seen = set()
    for e in doc.get("designs", {}).values():
        if e["id"] not in seen:
            seen.add(e["id"])
            lines.append(f"- {e['id']} (seed {e['seed']}, {e['role']}): {e['description']}")
    return "\n".join(lines) + "\n"


# --------------------------------------------------------------------------- main
def parse(argv: Sequence[str] | None = None) -> argparse.Namespace:
    ap = argparse.ArgumentParser(description=(__doc__ or "").splitlines()[0])
    ap.add_argument("--reps", type=int, default=20,
                    help="target replications per design (default: 20, the screen)")
    ap.add_argument("--designs", nargs="+", metavar="ID",
                    help="a subset of the tuning designs by id (default: all 12)")
    ap.add_argument("--evaluation", action="store_true",
                    help="run the 8 evaluation designs instead (needs --draw-seed)")
    ap.add_argument("--draw-seed", type=int, default=None,
                    help="seed that draws the evaluation designs (stored in the results)")
    ap.add_argument("--units", type=int, default=None,
                    help="override every design's N (quick checks; stored under its own key)")
    ap.add_argument("--periods", type=int, default=None, help="override every design's T")
    ap.add_argument("--jobs", type=int, default=1,
                    help="worker processes; learners are single-threaded (default: 1)")
    ap.add_argument("--checkpoint", type=int, default=5,
                    help="save after this many replications (default: 5)")
    ap.add_argument("--results", type=Path, default=RESULTS / "design_family.json")
    ap.add_argument("--resummarise", action="store_true",
                    help="recompute every stored design's summary from its replications "
                         "(after a change to the summary), then rewrite the table")
    ap.add_argument("--recheck", action="store_true",
                    help="rerun the debiased estimator of every stored replication (the same "
                         "estimate) to record the current interval-check signals and flag; "
                         "resumable")
    ap.add_argument("--table-only", action="store_true",
                    help="only rewrite design_family.md from the stored designs")
    a = ap.parse_args(argv)
    if a.reps < 1 or a.checkpoint < 1:
        ap.error("--reps and --checkpoint must be positive")
    if a.evaluation and a.draw_seed is None:
        ap.error("--evaluation needs --draw-seed S (draw it only after the defaults are frozen)")
    tuning_ids = [i for i, _ in TUNING]
    if a.designs and not a.evaluation:
        unknown = [d for d in a.designs if d not in tuning_ids]
        if unknown:
            ap.error(f"--designs {unknown} are not tuning designs; choose from {tuning_ids}")
    return a


def main(argv: Sequence[str] | None = None) -> int:
    a = parse(argv)
    path: Path = a.results
    path.parent.mkdir(parents=True, exist_ok=True)
    table = path.with_suffix(".md")
    if a.resummarise:
        with lock(path):
            doc = load(path)
            for entry in doc.get("designs", {}).values():
                entry["summary"] = summarise(MonteCarloResults.from_dict(entry["mc"]))
            save(path, doc)
        print(f"wrote {path}")
    if a.recheck:
        with lock(path):
            doc = load(path)
            keys = [k for k, e in doc.get("designs", {}).items()
                    if not a.designs or e["id"] in a.designs]
            for key in keys:
                recheck_design(doc, path, key, checkpoint=a.checkpoint)
                table.write_text(markdown(doc), encoding="utf-8")
        print(f"wrote {path} and {table}")
        return 0
    if a.table_only or a.resummarise:
        table.write_text(markdown(load(path)), encoding="utf-8")
        print(f"wrote {table}")
        return 0
    with lock(path):
        doc = load(path)
        doc.setdefault("designs", {})
        doc.pop("cells", None)  # load() returns {"cells": {}} for a new file
        doc["tuning"] = [{"id": i, "seed": s} for i, s in TUNING]
        if a.evaluation:
            drawn = evaluation_designs(a.draw_seed)
            previous = doc.get("evaluation")
            if previous and previous["draw_seed"] != a.draw_seed:
                sys.exit(f"design_family.py: the evaluation designs were drawn with seed "
                         f"{previous['draw_seed']}; rerun with that --draw-seed.")
            doc["evaluation"] = {"draw_seed": a.draw_seed,
                                 "designs": [{"id": i, "seed": s} for i, s in drawn]}
            todo = [(i, "evaluation") for i, _ in drawn]
            if a.designs:
                todo = [t for t in todo if t[0] in a.designs]
        else:
            todo = [(i, "tuning") for i, _ in TUNING if not a.designs or i in a.designs]
        t0 = time.perf_counter()
        for design_id, role in todo:
            run_design(doc, path, design_id=design_id, role=role, reps=a.reps, jobs=a.jobs,
                       checkpoint=a.checkpoint, units=a.units, periods=a.periods)
            table.write_text(markdown(doc), encoding="utf-8")
    print(f"done in {time.perf_counter() - t0:.0f} s; wrote {path} and {table}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
