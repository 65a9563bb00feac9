"""Scale: wall time per stage, peak memory and overhead from 10^4 to 10^6 rows, in one run.

The e-bike renewal scenario (binary choice, anchor ``swap``) with 49 covariates, so the learners
see 50 states (``wear`` and ``x0..x48``); 20 weeks per bike, so the rows are 20 x bikes.
LightGBM (the registry defaults), 5 folds, the default nested scheme and renewal-robust
moments, sequential backend. Each size runs in two fresh processes: one simulates the panel
and writes it to Parquet; the other reads the columns it needs through pyarrow
(:func:`orthoccp.spec.read_data` with ``columns=``, then :class:`~orthoccp.Panel`, as
:func:`orthoccp.read_panel` does), wraps the panel and estimates, so its peak memory
holds nothing but the estimation.

Measured per size:

* wall seconds per stage: reading, the panel, the classifiers (K fold fits and the nested
  scheme's K(K-1)/2 pair fits), the continuation regressions, the renewal-robust projections,
  the rest of the second stage (moments, solves, covariance, diagnostics);
* seconds inside learner ``fit`` and ``predict`` calls (``Results.timings``);
* the overhead ratio: (everything but learner fit and predict) / (learner fit), over reading,
  panel and estimation;
* peak resident memory (``VmHWM``) of the estimating process, against the in-memory size of
  the state matrix (rows x 50 float64).

Writes ``benchmarks/results/scale.json`` and the log-log plot ``scale.png``. Reproduce with::

    OMP_WAIT_POLICY=PASSIVE python benchmarks/scale.py            # 10^4, 10^5, 10^6 rows
    OMP_WAIT_POLICY=PASSIVE python benchmarks/scale.py --rows 10000 100000
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np

HERE = Path(__file__).resolve().parent
RESULTS = HERE / "results"
PERIODS = 20
COVARIATES = 49


def _status(field: str) -> float:
    """A memory figure of this process from /proc (MB)."""
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith(field + ":"):
            return int(line.split()[1]) / 1024
    raise KeyError(field)


def _reset_peak() -> None:
    """Reset VmHWM to the current resident size (Linux >= 4.0)."""
    Path("/proc/self/clear_refs").write_text("5")


def make_data(rows: int, path: Path, seed: int) -> None:
    """Simulate ``rows`` rows and write them, with the model description, next to ``path``."""
    from orthoccp.simulate import simulate

    t0 = time.perf_counter()
    sim = simulate("ebike", units=rows // PERIODS, periods=PERIODS, seed=seed,
                   n_covariates=COVARIATES)
    secs = time.perf_counter() - t0
    sim.data.to_parquet(path, index=False)
    meta = {
        "spec": sim.spec(), "persistent": list(sim.persistent), "truth": sim.truth,
        "rows": len(sim.data), "simulate_s": secs,
    }
    path.with_suffix(".json").write_text(json.dumps(meta))


class _Stopwatch:
    """Wraps functions of orthoccp.estimate to time the stages inside estimate()."""

    def __init__(self) -> None:
        self.seconds: dict[str, float] = {}
        self.nuisance_timings: dict[str, float] = {}

    def wrap(self, module: Any, name: str, stage: str) -> None:
        inner = getattr(module, name)

        def timed(*args: Any, **kwargs: Any) -> Any:
            t0 = time.perf_counter()
            out = inner(*args, **kwargs)
            self.seconds[stage] = self.seconds.get(stage, 0.0) + time.perf_counter() - t0
            if name == "crossfit_nuisances":
                for k, v in out.timings.items():
                    self.nuisance_timings[k] = self.nuisance_timings.get(k, 0.0) + v
            return out

        setattr(module, name, timed)


def fit(rows: int, path: Path) -> dict[str, Any]:
    """Read, wrap and estimate in this (fresh) process; timings and memory."""
    import importlib

    import orthoccp as oc
    from orthoccp.spec import read_data
    from orthoccp.spec._data import release_arrow_memory

    est_module = importlib.import_module("orthoccp.estimate")  # the module, not the function

    meta = json.loads(path.with_suffix(".json").read_text())
    spec = meta["spec"]
    data = spec["data"]
    utility_columns = sorted({c for p in spec["utility"].values() for c in p.values() if c != "1"})
    watch = _Stopwatch()
    for name, stage in [
        ("crossfit_nuisances", "first_stage"),
        ("renewal_robust_system", "renewal_robust_projections"),
        ("solve_plugin", "plugin_solve"),
        ("solve_orthogonal", "orthogonal_solve"),
        ("estimate_covariance", "covariance"),
        ("compute_diagnostics", "diagnostics"),
        ("build_moment_system", "moment_system"),
    ]:
        watch.wrap(est_module, name, stage)

    rss_start = _status("VmRSS")
    _reset_peak()
    t0 = time.perf_counter()
    frame = read_data(path, columns=[data["unit"], data["period"], data["choice"],
                                     *data["states"],
                                     *[c for c in utility_columns if c not in data["states"]]])
    t_read = time.perf_counter() - t0
    t1 = time.perf_counter()
    panel = oc.Panel(frame, unit=data["unit"], period=data["period"], choice=data["choice"],
                     states=data["states"])
    t_panel = time.perf_counter() - t1
    del frame  # the panel holds the (already sorted, so not copied) frame
    release_arrow_memory()  # as read_panel does: the state columns now live in the panel
    rss_panel = _status("VmRSS")
    peak_panel = _status("VmHWM")
    model = oc.Model(anchor=spec["model"]["anchor"], kind=spec["model"]["kind"],
                     discount=spec["model"]["discount"], utility=spec["utility"],
                     persistent=meta["persistent"])
    _reset_peak()
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # dominant-unit notes: not what is measured here
        t2 = time.perf_counter()
        res = oc.estimate(panel, model, learner="lightgbm", folds=5, seed=0)
        t_est = time.perf_counter() - t2
    peak_estimate = _status("VmHWM")

    state_mb = panel.features.nbytes / 2**20
    fit_s = res.timings["learner_fit_s"]
    predict_s = res.timings["learner_predict_s"]
    total = t_read + t_panel + t_est
    nt = watch.nuisance_timings
    stages = {
        "read_columns_s": t_read,
        "panel_s": t_panel,
        "classifiers_s": nt.get("ccp_s", 0.0),
        "continuation_regressions_s": nt.get("continuation_s", 0.0),
        "first_stage_other_s": watch.seconds["first_stage"] - nt.get("ccp_s", 0.0)
        - nt.get("continuation_s", 0.0),
        **{f"{k}_s": v for k, v in watch.seconds.items() if k != "first_stage"},
    }
    stages["estimate_other_s"] = t_est - sum(watch.seconds.values())
    return {
        "rows": panel.n_rows,
        "units": panel.n_units,
        "states": len(panel.feature_names),
        "learner_fits": res.n_learner_fits,
        "wall_s": {"total": total, "estimate": t_est, **stages},
        "learner_fit_s": fit_s,
        "learner_predict_s": predict_s,
        "overhead_s": total - fit_s - predict_s,
        "overhead_ratio": (total - fit_s - predict_s) / fit_s,
        "overhead_ratio_estimate_only": (t_est - fit_s - predict_s) / fit_s,
        "memory_mb": {
            "state_matrix": state_mb,
            "process_before_reading": rss_start,
            "panel_resident": rss_panel,
            "peak_reading_and_panel": peak_panel,
            "peak_estimate": peak_estimate,
            "peak_process": max(peak_panel, peak_estimate),
        },
        "memory_ratio": {
            "peak_process_over_state_matrix": max(peak_panel, peak_estimate) / state_mb,
            "peak_above_imports_over_state_matrix":
                (max(peak_panel, peak_estimate) - rss_start) / state_mb,
            "estimate_peak_above_panel_over_state_matrix": (peak_estimate - rss_panel) / state_mb,
        },
        "estimates": res.params.to_dict(),
        "std_errors": res.std_errors.to_dict(),
        "truth": meta["truth"],
        "simulate_s": meta["simulate_s"],
        "load_average_after": list(os.getloadavg()),
    }


def _child(args: list[str]) -> None:
    env = dict(os.environ, OMP_WAIT_POLICY="PASSIVE")
    subprocess.run([sys.executable, str(Path(__file__).resolve()), *args], check=True, env=env)


def _slope(points: list[dict[str, Any]], key: Any, lo: int, hi: int) -> float | None:
    by_rows = {p["rows_target"]: p for p in points}
    if lo not in by_rows or hi not in by_rows:
        return None
    a, b = key(by_rows[lo]), key(by_rows[hi])
    return float(np.log(b / a) / np.log(by_rows[hi]["rows"] / by_rows[lo]["rows"]))


def plot(points: list[dict[str, Any]], out: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    rows = np.array([p["rows"] for p in points], dtype=float)
    fig, ax = plt.subplots(figsize=(6, 4.2))
    series = [
        ("total (read + panel + estimate)", [p["wall_s"]["total"] for p in points], "o-"),
        ("learner fit", [p["learner_fit_s"] for p in points], "s--"),
        ("everything but fit and predict", [p["overhead_s"] for p in points], "^:"),
    ]
    for label, y, style in series:
        ax.loglog(rows, y, style, label=label)
    ref = np.array([rows[0], rows[-1]])
    ax.loglog(ref, points[0]["wall_s"]["total"] * ref / rows[0], color="grey", lw=0.8,
              label="slope 1 (linear)")
    ax.axhline(600, color="red", lw=0.8, ls="--", label="10 minutes")
    ax.set_xlabel("rows (unit-periods), 50 states")
    ax.set_ylabel("wall seconds")
    ax.set_title("orthoccp scale: e-bike renewal, LightGBM, 5 folds, 2 cores")
    ax.legend(fontsize=8)
    ax.grid(True, which="both", lw=0.3)
    fig.tight_layout()
    fig.savefig(out, dpi=120)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, nargs="+", default=[10_000, 100_000, 1_000_000])
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--out", type=Path, default=RESULTS / "scale.json")
    parser.add_argument("--make", nargs=2, metavar=("ROWS", "PATH"), help=argparse.SUPPRESS)
    parser.add_argument("--fit", nargs=3, metavar=("ROWS", "PATH", "OUT"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.make:
        make_data(int(args.make[0]), Path(args.make[1]), args.seed)
        return
    if args.fit:
        Path(args.fit[2]).write_text(json.dumps(fit(int(args.fit[0]), Path(args.fit[1]))))
        return

    import lightgbm

    import orthoccp
    from orthoccp.learners import _lgbm_common

    started = time.time()
    malloc_env = {k: v for k, v in sorted(os.environ.items()) if k.startswith("MALLOC_")}
    meta: dict[str, Any] = {
        "command": " ".join(f"{k}={v}" for k, v in malloc_env.items())
        + (" " if malloc_env else "")
        + "OMP_WAIT_POLICY=PASSIVE python benchmarks/scale.py --rows "
        + " ".join(map(str, args.rows))
        + ("" if args.out == RESULTS / "scale.json" else f" --out {args.out}"),
        "malloc_env": malloc_env,
        "scenario": f"ebike, {PERIODS} weeks per bike, {COVARIATES} covariates + wear = 50 states",
        "estimator": "estimate(learner='lightgbm', folds=5, seed=0): nested scheme, "
        "renewal-robust moments, backend='sequential'",
        "learner_threads": _lgbm_common()["n_jobs"],
        "cores": os.cpu_count(),
        "load_average_at_start": list(os.getloadavg()),
        "note": "the 2 cores are shared with other developers' processes while this runs; "
        "the load averages (1, 5, 15 min) at the start and after each size say how busy",
        "python": platform.python_version(),
        "orthoccp": orthoccp.__version__,
        "lightgbm": lightgbm.__version__,
        "numpy": np.__version__,
    }
    points = []
    with tempfile.TemporaryDirectory(prefix="orthoccp-scale-") as tmp:
        for rows in args.rows:
            path = Path(tmp) / f"panel_{rows}.parquet"
            out = Path(tmp) / f"fit_{rows}.json"
            _child(["--seed", str(args.seed), "--make", str(rows), str(path)])
            _child(["--fit", str(rows), str(path), str(out)])
            point = json.loads(out.read_text()) | {"rows_target": rows}
            points.append(point)
            print(f"{point['rows']:>9} rows: {point['wall_s']['total']:8.1f} s total, "
                  f"fit {point['learner_fit_s']:7.1f} s, overhead ratio "
                  f"{point['overhead_ratio']:.3f}, peak {point['memory_mb']['peak_process']:.0f} MB "
                  f"({point['memory_ratio']['peak_process_over_state_matrix']:.2f}x the state "
                  f"matrix)", flush=True)
            path.unlink()
    meta["wall_s_whole_run"] = time.time() - started
    summary = {
        "loglog_slope_total_1e5_1e6": _slope(points, lambda p: p["wall_s"]["total"], 100_000, 1_000_000),
        "loglog_slope_learner_fit_1e5_1e6": _slope(points, lambda p: p["learner_fit_s"], 100_000, 1_000_000),
        "loglog_slope_total_1e4_1e5": _slope(points, lambda p: p["wall_s"]["total"], 10_000, 100_000),
    }
    targets = {
        "1e6_rows_under_600_s": next((p["wall_s"]["total"] < 600 for p in points
                                      if p["rows_target"] == 1_000_000), None),
        "overhead_ratio_below_0.15_from_1e5": all(p["overhead_ratio"] < 0.15 for p in points
                                                  if p["rows_target"] >= 100_000),
        "loglog_slope_at_most_1.1": (summary["loglog_slope_total_1e5_1e6"] or 0.0) <= 1.1,
        "peak_memory_within_3x_state_matrix_at_1e6": next(
            (p["memory_ratio"]["peak_process_over_state_matrix"] <= 3 for p in points
             if p["rows_target"] == 1_000_000), None),
    }
    doc = {"meta": meta, "points": points, "summary": summary, "targets": targets}
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(json.dumps(doc, indent=1))
    plot(points, args.out.with_suffix(".png"))
    print(json.dumps({"summary": summary, "targets": targets}, indent=1))


if __name__ == "__main__":
    main()
