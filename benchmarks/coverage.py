"""Standing coverage benchmark: plug-in vs debiased vs oracle over scenarios, sizes and learners.

The grid: scenarios ``ebike`` (binary renewal), ``ebike3`` (three-choice renewal) and
``producers`` (binary terminal); N in {500, 2000} units of 12 periods; first stages
``lightgbm``, ``lasso_logit`` and the parametric ``logit`` (and, run for some cells only, the
smoother ``lightgbm_smooth``); 5 folds. The headline cells are
N = 2000 with LightGBM, with a target of 200 replications each. Every cell is one
:func:`orthoccp.montecarlo.run_montecarlo` run with seed 0, so the cells of one scenario and
N share their simulated panels across learners.

Resumable: each cell is stored in ``benchmarks/results/coverage.json`` under its key
(``ebike|N=500|logit``) after every ``--checkpoint`` replications; a rerun continues partial
cells and skips finished ones (a larger ``--reps`` extends them). Writes the markdown table
``benchmarks/results/coverage.md`` of the finished cells, and a plot per
finished cell (``coverage_<cell>.png``). Learners run single-threaded; ``--jobs`` workers
therefore use ``--jobs`` cores. Reproduce, e.g.::

    python benchmarks/coverage.py --reps 50 --scenario ebike --units 500 --learner logit lightgbm
    python benchmarks/coverage.py --reps 200                  # the whole grid
    python benchmarks/coverage.py --table-only                # rewrite coverage.md only
"""

from __future__ import annotations

import argparse
import contextlib
import json
import os
import sys
import time
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any

# LightGBM's OpenMP threads spin while waiting unless told otherwise; on a shared machine that
# costs an order of magnitude (see orthoccp.cli.main).
os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

from orthoccp import __version__  # noqa: E402
from orthoccp.montecarlo import MonteCarloResults, run_montecarlo  # noqa: E402

SCENARIOS = ("ebike", "ebike3", "producers")
UNITS = (500, 2000)
LEARNERS = ("logit", "lasso_logit", "lightgbm", "lightgbm_smooth")
HEADLINE = {"units": 2000, "learner": "lightgbm"}
PERIODS = 12
FOLDS = 5
SEED = 0
RESULTS = Path(__file__).parent / "results"
DESCRIPTION = {
    "ebike": "binary renewal",
    "ebike3": "three-choice renewal",
    "producers": "binary terminal",
}


def cell_key(scenario: str, units: int, learner: str, ccp_steps: int = 0) -> str:
    """The key of a cell in ``coverage.json``, e.g. ``"ebike|N=500|logit"``, with
    ``"|ccp_steps=2"`` appended when the debiased estimator takes model-implied CCP steps."""
    key = f"{scenario}|N={units}|{learner}"
    return f"{key}|ccp_steps={ccp_steps}" if ccp_steps else key


def cell_slug(key: str) -> str:
    """A file-name form of a cell key, e.g. ``"ebike_N500_logit"``."""
    return key.replace("|N=", "_N").replace("|ccp_steps=", "_ccpsteps").replace("|", "_")


# --------------------------------------------------------------------------- storage
def load(path: Path) -> dict[str, Any]:
    """The stored document, or an empty one."""
    if not path.exists():
        return {"cells": {}}
    return json.loads(path.read_text(encoding="utf-8"))


def save(path: Path, doc: dict[str, Any]) -> None:
    """Write atomically, so an interrupted run never leaves a broken file."""
    doc["updated"] = time.strftime("%Y-%m-%d %H:%M:%S")
    doc["orthoccp_version"] = __version__
    tmp = path.with_suffix(".json.tmp")
    tmp.write_text(json.dumps(doc, indent=1, allow_nan=False) + "\n", encoding="utf-8")
    os.replace(tmp, path)


@contextlib.contextmanager
def lock(path: Path) -> Iterator[None]:
    """One writer at a time: a second run on the same results file stops with a message."""
    lock_path = path.with_suffix(".lock")
    try:
        fd = os.open(lock_path, os.O_CREAT | os.O_EXCL | os.O_WRONLY)
    except FileExistsError:
        pid = lock_path.read_text().strip()
        alive = False
        with contextlib.suppress(ValueError, ProcessLookupError, PermissionError):
            os.kill(int(pid), 0)
            alive = True
        if alive:
            sys.exit(f"coverage.py: another run (pid {pid}) is writing {path}; wait for it.")
        lock_path.unlink()
        fd = os.open(lock_path, os.O_CREAT | os.O_EXCL | os.O_WRONLY)
    os.write(fd, str(os.getpid()).encode())
    os.close(fd)
    try:
        yield
    finally:
        lock_path.unlink(missing_ok=True)


def stored_results(entry: dict[str, Any] | None) -> MonteCarloResults | None:
    if entry is None or "mc" not in entry:
        return None
    return MonteCarloResults.from_dict(entry["mc"])


# --------------------------------------------------------------------------- one cell
def run_cell(
    doc: dict[str, Any],
    path: Path,
    *,
    scenario: str,
    units: int,
    learner: str,
    reps: int,
    jobs: int,
    checkpoint: int,
    ccp_steps: int = 0,
) -> str:
    """Bring one cell to ``reps`` replications, saving after every ``checkpoint``."""
    key = cell_key(scenario, units, learner, ccp_steps)
    entry = doc["cells"].get(key)
    done = stored_results(entry)
    have = 0 if done is None else done.reps
    if done is not None:
        expected = set(range(have))
        if set(done.replications["rep"].unique()) != expected:
            sys.exit(f"coverage.py: cell {key} holds non-contiguous replications; delete it.")
    if have >= reps:
        print(f"{key}: finished ({have} replications), skipped", flush=True)
        return "skipped"
    t0 = time.perf_counter()
    print(f"{key}: {have} of {reps} replications stored, running the rest", flush=True)
    while have < reps:
        step = min(checkpoint, reps - have)
        part = run_montecarlo(
            scenario,
            reps=step,
            first_rep=have,
            units=units,
            periods=PERIODS,
            learner=learner,
            folds=FOLDS,
            seed=SEED,
            jobs=jobs,
            model_ccp_steps=ccp_steps,
            progress=False,
        )
        if done is not None and part.settings != done.settings:
            sys.exit(
                f"coverage.py: cell {key} was stored with other settings ({done.settings}); "
                f"delete it from {path} to rerun it."
            )
        done = part if done is None else MonteCarloResults.concat([done, part])
        have = done.reps
        status = "finished" if have >= reps else "partial"
        doc["cells"][key] = {
            "scenario": scenario,
            "units": units,
            "learner": learner,
            "periods": PERIODS,
            "folds": FOLDS,
            "seed": SEED,
            **({"model_ccp_steps": ccp_steps} if ccp_steps else {}),
            "target_reps": reps,
            "status": status,
            "mc": done.to_dict(),
        }
        save(path, doc)
        fails = ", ".join(f"{k} {v}" for k, v in done.failures.items() if v) or "none"
        print(
            f"{key}: {have}/{reps} replications ({time.perf_counter() - t0:.0f} s this run; "
            f"failures: {fails})",
            flush=True,
        )
    return "ran"


# --------------------------------------------------------------------------- report
def _fmt(value: Any, spec: str) -> str:
    if value is None or (isinstance(value, float) and value != value):
        return "–"
    return format(value, spec)


def markdown(doc: dict[str, Any], *, source: str = "benchmarks/results/coverage.json") -> str:
    """The table of the finished cells (and a list of the unfinished ones)."""
    cells = doc.get("cells", {})
    order = {(s, n, lr): i for i, (s, n, lr) in enumerate(
        (s, n, lr) for s in SCENARIOS for n in UNITS for lr in LEARNERS
    )}

    def rank(key: str) -> int:
        e = cells[key]
        return order.get((e["scenario"], e["units"], e["learner"]), len(order))

    finished = sorted((k for k, e in cells.items() if e.get("status") == "finished"), key=rank)
    partial = sorted((k for k, e in cells.items() if e.get("status") != "finished"), key=rank)
    lines = [
        "# Coverage benchmark",
        "",
        f"Written by `benchmarks/coverage.py` from `{source}` "
        f"(orthoccp {doc.get('orthoccp_version', '?')}, updated {doc.get('updated', '?')}).",
        f"Each cell: the scenario simulated with {PERIODS} periods per unit, seed {SEED}, "
        f"{FOLDS}-fold cross-fitting, single-threaded learners. Per estimator and parameter: "
        "bias, SD of the estimates, mean standard error, their ratio (1 when the standard "
        "errors are right), RMSE, coverage of the 95 % interval with its Monte Carlo standard "
        "error, mean interval length, median seconds per estimate, failed estimates. "
        "*plug-in* uses the cross-fitted nuisances without correction, *debiased* adds the "
        "orthogonal correction (moments in the last column), *oracle* is the plug-in with the "
        "simulator's exact nuisances. Headline cells: N = 2000 with LightGBM.",
        "",
        "Reproduce a cell with `python benchmarks/coverage.py --reps R --scenario S --units N "
        "--learner L` (finished cells are skipped; delete a cell's entry to rerun it).",
        "",
    ]
    if not finished:
        lines.append("No cell has finished yet.")
    else:
        lines += [
            "| scenario | N | learner | reps | estimator | parameter | truth | bias | SD | "
            "mean SE | SD/SE | RMSE | coverage (MC s.e.) | mean CI length | s | failures | "
            "moments |",
            "|---|---:|---|---:|---|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---|",
        ]
        labels = {"naive": "plug-in", "debiased": "debiased", "oracle": "oracle"}
        for key in finished:
            e = cells[key]
            mc = e["mc"]
            head = e["units"] == HEADLINE["units"] and e["learner"] == HEADLINE["learner"]
            scen = f"**{e['scenario']}**" if head else e["scenario"]
            if e.get("model_ccp_steps"):
                scen += f" ({e['model_ccp_steps']} model CCP steps)"
            for r in mc["summary"]:
                lines.append(
                    f"| {scen} | {e['units']} | {e['learner']} | {mc['reps']} | "
                    f"{labels.get(r['estimator'], r['estimator'])} | {r['parameter']} | "
                    f"{_fmt(r['truth'], 'g')} | {_fmt(r['bias'], '.3f')} | {_fmt(r['sd'], '.3f')} | "
                    f"{_fmt(r['mean_se'], '.3f')} | {_fmt(r['sd_over_se'], '.2f')} | "
                    f"{_fmt(r['rmse'], '.3f')} | {_fmt(r['coverage'], '.3f')} "
                    f"({_fmt(r['coverage_mcse'], '.3f')}) | {_fmt(r['mean_ci_length'], '.3f')} | "
                    f"{_fmt(r['median_seconds'], '.1f')} | {r['failures']} | {r['moments'] or '–'} |"
                )
    if partial:
        lines += ["", "Unfinished cells (not in the table):", ""]
        for key in partial:
            e = cells[key]
            lines.append(f"- `{key}`: {e['mc']['reps']} of {e['target_reps']} replications")
    wall = [
        (k, cells[k]["mc"].get("wall_seconds")) for k in finished if cells[k]["mc"].get("wall_seconds")
    ]
    if wall:
        lines += ["", "Wall time per finished cell (seconds, all runs of it added): "
                  + ", ".join(f"`{k}` {w:.0f}" for k, w in wall) + "."]
    return "\n".join(lines) + "\n"


def write_report(doc: dict[str, Any], path: Path, *, plots: bool) -> list[Path]:
    """Write ``coverage.md`` (and the plots of the finished cells) beside ``path``."""
    folder = path.parent
    written = [folder / "coverage.md"]
    try:
        source = str(path.resolve().relative_to(Path(__file__).resolve().parent.parent))
    except ValueError:
        source = str(path)
    written[0].write_text(markdown(doc, source=source), encoding="utf-8")
    if plots:
        for key, e in doc.get("cells", {}).items():
            if e.get("status") == "finished":
                written.append(
                    MonteCarloResults.from_dict(e["mc"]).plot(
                        folder / f"coverage_{cell_slug(key)}.png"
                    )
                )
    return written


# --------------------------------------------------------------------------- main
def parse(argv: Sequence[str] | None = None) -> argparse.Namespace:
    ap = argparse.ArgumentParser(description=(__doc__ or "").splitlines()[0])
    ap.add_argument("--reps", type=int, default=200,
                    help="target replications per cell (default: 200)")
    ap.add_argument("--scenario", nargs="+", choices=SCENARIOS, default=list(SCENARIOS))
    ap.add_argument("--units", nargs="+", type=int, choices=UNITS, default=list(UNITS))
    ap.add_argument("--learner", nargs="+", choices=LEARNERS, default=list(LEARNERS))
    ap.add_argument("--jobs", type=int, default=1,
                    help="worker processes; learners are single-threaded (default: 1)")
    ap.add_argument("--model-ccp-steps", type=int, default=0,
                    help="model-implied CCP steps of the debiased estimator (terminal "
                         "scenarios; stored as separate cells, key suffix |ccp_steps=K)")
    ap.add_argument("--checkpoint", type=int, default=10,
                    help="save after this many replications (default: 10)")
    ap.add_argument("--results", type=Path, default=RESULTS / "coverage.json")
    ap.add_argument("--no-plots", action="store_true", help="skip the per-cell PNG plots")
    ap.add_argument("--table-only", action="store_true",
                    help="only rewrite coverage.md (and the plots) from the stored cells")
    a = ap.parse_args(argv)
    if a.reps < 1 or a.checkpoint < 1:
        ap.error("--reps and --checkpoint must be positive")
    return a


def main(argv: Sequence[str] | None = None) -> int:
    a = parse(argv)
    path: Path = a.results
    path.parent.mkdir(parents=True, exist_ok=True)
    if a.table_only:
        doc = load(path)
        for p in write_report(doc, path, plots=not a.no_plots):
            print(f"wrote {p}")
        return 0
    with lock(path):
        doc = load(path)
        cells = [(s, n, lr) for s in a.scenario for n in a.units for lr in a.learner]
        # The cheapest cells first: small N, then the parametric first stage.
        cells.sort(key=lambda c: (c[1], LEARNERS.index(c[2]), SCENARIOS.index(c[0])))
        t0 = time.perf_counter()
        for scenario, units, learner in cells:
            run_cell(doc, path, scenario=scenario, units=units, learner=learner, reps=a.reps,
                     jobs=a.jobs, checkpoint=a.checkpoint, ccp_steps=a.model_ccp_steps)
            write_report(doc, path, plots=False)
        written = write_report(doc, path, plots=not a.no_plots)
    print(f"done in {time.perf_counter() - t0:.0f} s; wrote {path}, "
          + ", ".join(str(p) for p in written))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
