"""Command-line interface: ``orthoccp demo``, ``simulate``, ``estimate``, ``compare``, ``report``
and ``montecarlo``.

Exit codes: 0 on success; 2 on a usage or input error (bad option, missing file, bad spec,
bad data), reported as one line ``orthoccp: error: ...`` on stderr; 1 when the estimation
itself fails (:class:`~orthoccp.EstimationError`) or on an unexpected error. ``--debug``
adds the traceback.

The command line sets ``OMP_WAIT_POLICY=PASSIVE`` for its own process unless the variable is
already set (see :func:`main`).
"""

from __future__ import annotations

import argparse
import contextlib
import json
import math
import os
import shlex
import sys
import time
import traceback
import warnings
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import Any, NoReturn, TextIO

import numpy as np
import pandas as pd

import orthoccp as oc

from ._version import __version__
from .spec import (
    Spec,
    SpecError,
    data_format,
    data_stem,
    read_spec,
    write_data,
    write_spec,
)

__all__ = ["main", "results_payload"]

PROG = "orthoccp"
DEMO_SCENARIO = "ebike"
DEMO_FOLDER = "orthoccp-demo"

_Handler = Callable[[argparse.Namespace], int]


# --------------------------------------------------------------------------- plumbing
class _UsageError(Exception):
    """A command-line usage error (raised instead of argparse's print-and-exit)."""


class _Parser(argparse.ArgumentParser):
    """An argument parser whose errors become one-line messages handled by :func:`main`."""

    def error(self, message: str) -> NoReturn:
        raise _UsageError(f"{message} (see '{self.prog} --help')")


class _Formatter(argparse.RawDescriptionHelpFormatter):
    """Keeps the hand-formatted examples in the epilogs and shows defaults."""

    def __init__(self, prog: str) -> None:
        super().__init__(prog, max_help_position=32)


def _one_line(text: str) -> str:
    return " ".join(str(text).split())


def _error_message(exc: BaseException) -> str:
    if isinstance(exc, OSError) and exc.filename is not None and exc.strerror:
        return f"{exc.strerror}: {str(exc.filename)!r}"
    text = _one_line(str(exc))
    return text or type(exc).__name__


def _report(exc: BaseException, *, debug: bool, prefix: str = "error") -> None:
    if debug:
        traceback.print_exception(type(exc), exc, exc.__traceback__, file=sys.stderr)
    print(f"{PROG}: {prefix}: {_error_message(exc)}", file=sys.stderr)


class _Progress:
    """Stage names on stderr, only when stderr is a terminal.

    Parameters
    ----------
    stream : text stream, optional
        Where to write; ``sys.stderr`` when omitted.
    enabled : bool, optional
        Force on or off; by default on exactly when ``stream`` is a terminal.
    """

    def __init__(self, *, stream: TextIO | None = None, enabled: bool | None = None) -> None:
        self.stream = stream if stream is not None else sys.stderr
        if enabled is None:
            isatty = getattr(self.stream, "isatty", None)
            enabled = bool(isatty()) if callable(isatty) else False
        self.enabled = enabled
        self.start = time.perf_counter()

    @property
    def elapsed(self) -> float:
        """Seconds since the progress reporter was created."""
        return time.perf_counter() - self.start

    def stage(self, name: str) -> None:
        """Announce a stage."""
        if self.enabled and self.stream is not None:
            print(f"{PROG}: [{self.elapsed:6.1f}s] {name}", file=self.stream, flush=True)


@contextlib.contextmanager
def _warnings_to_stderr(*, debug: bool) -> Iterator[None]:
    """Show orthoccp's warnings as one line each (once); others only with ``--debug``."""
    seen: set[tuple[type[Warning], str]] = set()

    def show(
        message: Warning | str,
        category: type[Warning],
        filename: str,
        lineno: int,
        file: TextIO | None = None,
        line: str | None = None,
    ) -> None:
        text = _one_line(str(message))
        if (category, text) in seen:
            return
        seen.add((category, text))
        if issubclass(category, oc.OrthoCCPWarning):
            print(f"{PROG}: warning: {text}", file=sys.stderr)
        elif debug:
            where = f"{category.__name__}, {filename}:{lineno}"
            print(f"{PROG}: warning ({where}): {text}", file=sys.stderr)

    with warnings.catch_warnings():
        warnings.simplefilter("default")
        warnings.showwarning = show
        yield


def _display_path(path: Path) -> str:
    """``path`` relative to the working directory when it lies below it, else absolute."""
    absolute = path.absolute()
    try:
        return str(absolute.relative_to(Path.cwd()))
    except ValueError:
        return str(absolute)


def _output_path(option: str, value: str | None) -> Path | None:
    """Check an output option before the (possibly long) estimation runs."""
    if value is None or value == "-":
        return None
    p = Path(value)
    if p.is_dir():
        raise oc.InputError(f"{option} {value!r} is a folder; give a file name.")
    return p


def _write_text(path: Path, text: str) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(text, encoding="utf-8")


# --------------------------------------------------------------------------- JSON
def _json_safe(value: Any, where: str, nulls: dict[str, str]) -> Any:
    """Plain JSON values; non-finite numbers become ``None`` and their reason is recorded."""
    if isinstance(value, dict):
        return {
            str(k): _json_safe(v, f"{where}.{k}" if where else str(k), nulls)
            for k, v in value.items()
        }
    if isinstance(value, (list, tuple)):
        return [_json_safe(v, f"{where}[{i}]", nulls) for i, v in enumerate(value)]
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        nulls[where] = "NaN: not defined for this fit" if math.isnan(value) else "infinite"
        return None
    if value is None:
        nulls[where] = "not a finite number in the results (NaN or infinite), written as null"
        return None
    if isinstance(value, (str, int, float, bool)):
        return value
    return str(value)


def results_payload(res: oc.Results, *, inputs: dict[str, str] | None = None) -> dict[str, Any]:
    """The JSON document written by ``orthoccp estimate --json``.

    Parameters
    ----------
    res : Results
        An estimation result.
    inputs : dict, optional
        Names of the input files (``{"data": ..., "spec": ...}``), recorded under ``inputs``.

    Returns
    -------
    dict
        :meth:`Results.to_dict` (estimates with 95 % intervals, sample sizes, first-stage
        settings, timings, clipping counts, version, ...) made strictly JSON-safe: no NaN or
        infinity is ever written; such values are ``null`` and ``nulls`` maps each one's
        location (``"params[0].std_error"``) to the reason. ``inputs`` echoes the files.
    """
    raw = res.to_dict(0.95)
    nulls: dict[str, str] = {}
    doc = _json_safe(raw, "", nulls)
    doc["inputs"] = dict(inputs or {})
    doc["nulls"] = nulls
    return doc


def _dumps(doc: dict[str, Any]) -> str:
    return json.dumps(doc, indent=2, allow_nan=False) + "\n"


# --------------------------------------------------------------------------- spec from a simulation
def _simulation_spec(
    sim: Any, *, data_file: str, learner: str, folds: int, seed: int
) -> dict[str, Any]:
    """The spec document of a simulated panel, with the data path relative to the spec."""
    spec_method = getattr(sim, "spec", None)
    if callable(spec_method):
        base = spec_method()
        data = dict(base["data"])
        model = dict(base["model"])
        utility = {str(c): dict(p) for c, p in base["utility"].items()}
    else:
        data = {
            "unit": sim.unit,
            "period": sim.period,
            "choice": sim.choice,
            "states": list(sim.states),
        }
        model = {"kind": sim.kind, "anchor": sim.anchor, "discount": float(sim.discount)}
        utility = {str(c): dict(p) for c, p in sim.utility.items()}
    data["path"] = data_file
    persistent = list(getattr(sim, "persistent", ()) or ())
    if persistent and "persistent" not in model:
        model["persistent"] = persistent
    return {
        "data": data,
        "model": model,
        "utility": utility,
        "first_stage": {"learner": learner, "folds": int(folds), "seed": int(seed)},
    }


def _truth_header(sim: Any, *, command: str) -> str:
    truth = ", ".join(f"{k} = {v!r}" for k, v in sim.truth.items())
    n_units = int(sim.data[sim.unit].nunique())
    return (
        f"Written by 'orthoccp {command}': scenario {sim.scenario!r}, {n_units} units, "
        f"{len(sim.data)} rows, seed {sim.seed}.\n"
        f"True parameters: {truth}.\n"
        f"Relative paths are relative to this file's folder."
    )


def _rerun_command(data: Path, spec: Path) -> str:
    data_arg, spec_arg = shlex.quote(_display_path(data)), shlex.quote(_display_path(spec))
    return f"{PROG} estimate {data_arg} --spec {spec_arg}"


# --------------------------------------------------------------------------- estimate
def _build_panel(spec: Spec, frame: pd.DataFrame, data_path: Path) -> oc.Panel:
    """The panel; data errors name the data file (spec errors already name the spec)."""
    try:
        return spec.build_panel(frame)
    except SpecError:
        raise
    except oc.InputError as exc:
        raise oc.InputError(f"{data_path}: {exc}") from exc


def _read_spec(args: argparse.Namespace, progress: _Progress, **overrides: Any) -> Spec:
    progress.stage(f"reading the spec {args.spec}")
    spec: Spec = read_spec(args.spec)
    if spec.estimator.discrete:
        flags = {"learner": "--learner", "debias": "--naive"}
        given = [flags.get(k, f"--{k}") for k, v in overrides.items() if v is not None]
        if getattr(args, "folds", None) is not None:
            given.append("--folds")
        if given:
            raise oc.InputError(
                f"{given[0]} does not apply: the spec selects estimator.method = "
                f"{spec.estimator.method!r}, which fits no learner; drop the option."
            )
    return spec.with_options(folds=args.folds, seed=args.seed, **overrides)


def _load_panel(args: argparse.Namespace, spec: Spec, progress: _Progress) -> tuple[Path, oc.Panel]:
    data_path = spec.data_path(args.data)
    progress.stage(f"reading the data {data_path}")
    frame = spec.load_data(args.data)
    progress.stage(f"checking {len(frame)} rows against the spec")
    return data_path, _build_panel(spec, frame, data_path)


def _read_inputs(
    args: argparse.Namespace, progress: _Progress, **overrides: Any
) -> tuple[Path, oc.Panel, oc.Model, dict[str, Any]]:
    """Spec (with command-line overrides), data, panel, model and the estimate options."""
    spec = _read_spec(args, progress, **overrides)
    if spec.estimator.discrete:
        raise oc.InputError(
            f"this command runs the orthogonal estimator; the spec selects estimator.method = "
            f"{spec.estimator.method!r}. Use 'orthoccp estimate' for it."
        )
    data_path, panel = _load_panel(args, spec, progress)
    model = spec.build_model(panel)
    return data_path, panel, model, spec.estimate_options()


def _cmd_estimate(args: argparse.Namespace) -> int:
    progress = _Progress()
    json_path = _output_path("--json", args.json)
    latex_path = _output_path("--latex", args.latex)
    overrides = dict(learner=args.learner, debias=False if args.naive else None)
    spec = _read_spec(args, progress, **overrides)
    data_path, panel = _load_panel(args, spec, progress)
    if spec.estimator.discrete:
        progress.stage(f"estimating by {spec.estimator.method.upper()} on the discrete states")
        res: oc.Results = oc.estimate_discrete(
            panel, utility=spec.build_utility(panel), **spec.discrete_options(panel)
        )
    else:
        model = spec.build_model(panel)
        options = spec.estimate_options()
        method = "debiased" if options.get("debias", True) else "plug-in"
        progress.stage(
            f"estimating ({method}): cross-fitted first stage with "
            f"{options.get('learner', 'the default learner')}, then the second stage"
        )
        res = oc.estimate(panel, model, **options)
    progress.stage("writing the results")
    payload = results_payload(res, inputs={"data": str(data_path), "spec": str(args.spec)})
    # With '--json -' stdout carries the JSON document only.
    json_on_stdout = args.json == "-"
    if json_on_stdout:
        sys.stdout.write(_dumps(payload))
    else:
        print(res.summary())
    if args.latex == "-":
        sys.stdout.write(res.to_latex() + "\n")
    for path, text in ((json_path, _dumps(payload)), (latex_path, res.to_latex() + "\n")):
        if path is not None:
            _write_text(path, text)
            if not json_on_stdout:
                print(f"wrote {path}")
    progress.stage(f"done in {progress.elapsed:.1f}s")
    return 0


# --------------------------------------------------------------------------- compare, report
def _first_stages(args: argparse.Namespace, options: dict[str, Any]) -> dict[str, str]:
    """``--with`` names in order (default: logit, then the spec's learner), without repeats."""
    names = list(args.first_stages or [])
    if not names:
        names = ["logit", str(options.get("learner", "lightgbm"))]
    stages: dict[str, str] = {}
    for name in names:
        if name in stages:
            raise oc.InputError(f"--with {name!r} is given twice; name each first stage once.")
        stages[name] = name
    return stages


def _run_comparison(
    args: argparse.Namespace, progress: _Progress
) -> tuple[Path, oc.Panel, oc.Model, dict[str, Any], oc.Comparison]:
    data_path, panel, model, options = _read_inputs(args, progress)
    if options.pop("debias", True) is False:
        raise oc.InputError(
            "the spec sets inference.debias = false; compare and report run debiased "
            "estimates only. Remove the key or set it to true."
        )
    stages = _first_stages(args, options)
    options.pop("learner", None)
    options.pop("regressor", None)
    if args.baseline is not None and args.baseline not in stages:
        raise oc.InputError(
            f"--baseline {args.baseline!r} is not among the first stages ({', '.join(stages)}); "
            f"add --with {args.baseline}."
        )
    progress.stage(f"estimating (debiased) with {', '.join(stages)}")
    cmp = oc.compare(panel, model, first_stages=stages, baseline=args.baseline, **options)
    return data_path, panel, model, options, cmp


def _cmd_compare(args: argparse.Namespace) -> int:
    progress = _Progress()
    outputs = {
        "--json": _output_path("--json", args.json),
        "--latex": _output_path("--latex", args.latex),
        "--html": _output_path("--html", args.html),
    }
    data_path, _, _, _, cmp = _run_comparison(args, progress)
    print(cmp.summary())
    doc = {
        "inputs": {"data": str(data_path), "spec": str(args.spec)},
        "baseline": cmp.baseline,
        "first_stages": {
            label: results_payload(res) for label, res in cmp.results.items()
        },
        "tests": {
            label: {
                "parameters": [
                    {"parameter": str(k), **{c: float(v) for c, v in row.items()}}
                    for k, row in test.iterrows()
                ],
                "wald": {k: float(v) for k, v in test.attrs["wald"].items()},
            }
            for label, test in cmp.tests.items()
        },
    }
    texts = {"--json": lambda: _dumps(doc), "--latex": lambda: cmp.to_latex() + "\n",
             "--html": cmp._repr_html_}
    for option, path in outputs.items():
        if path is not None:
            _write_text(path, texts[option]())
            print(f"wrote {path}")
    progress.stage(f"done in {progress.elapsed:.1f}s")
    return 0


def _cmd_report(args: argparse.Namespace) -> int:
    from .report import write_report
    from .stability import fold_stability

    progress = _Progress()
    out = Path(args.out)
    if out.suffix.lower() not in (".html", ".htm"):
        raise oc.InputError(f"--out {args.out!r} must be an .html file name.")
    if out.is_dir():
        raise oc.InputError(f"--out {args.out!r} is a folder; give a file name such as report.html.")
    try:
        import matplotlib  # noqa: F401
    except ImportError as exc:
        raise oc.InputError(
            "the report's figures need matplotlib, an optional dependency: pip install "
            "'orthoccp[plot]' (or pip install matplotlib)."
        ) from exc
    _, panel, model, options, cmp = _run_comparison(args, progress)
    stability = {}
    if args.stability:
        for label in cmp.results:
            if label == cmp.baseline:
                continue
            progress.stage(f"fold stability of {label}: refitting each fold with another seed")
            stability[label] = fold_stability(panel, model, learner=label, **options)
    progress.stage(f"writing {out}")
    write_report(cmp, out, stability=stability)
    print(cmp.summary())
    for label, fs in stability.items():
        print(f"{label}: {fs.reading()}")
    print(f"wrote {out}")
    progress.stage(f"done in {progress.elapsed:.1f}s")
    return 0


# --------------------------------------------------------------------------- simulate
def _cmd_simulate(args: argparse.Namespace) -> int:
    from .simulate import simulate

    progress = _Progress()
    out = Path(args.out)
    data_format(out, writing=True)
    if out.is_dir():
        raise oc.InputError(f"--out {args.out!r} is a folder; give a file name such as panel.csv.")
    spec_path = data_stem(out).with_suffix(".toml")
    progress.stage(f"simulating {args.scenario!r}: {args.units} units x {args.periods} periods")
    sim = simulate(
        args.scenario,
        units=args.units,
        periods=args.periods,
        seed=args.seed,
        discount=args.discount,
        n_covariates=args.covariates,
    )
    progress.stage(f"writing {out} and {spec_path}")
    write_data(sim.data, out)
    document = _simulation_spec(
        sim, data_file=out.name, learner="lightgbm", folds=5, seed=args.seed
    )
    write_spec(spec_path, document, header=_truth_header(sim, command="simulate"))
    truth = ", ".join(f"{k} {v:g}" for k, v in sim.truth.items())
    print(f"wrote {out} ({len(sim.data)} rows, {args.units} units) and {spec_path}")
    print(
        f"scenario {args.scenario!r}: {sim.kind} model, anchor {sim.anchor!r}, discount "
        f"{sim.discount:g}; true parameters: {truth}"
    )
    print(f"estimate with: {_rerun_command(out, spec_path)}")
    return 0


# --------------------------------------------------------------------------- demo
def _demo_folder(out: str | None) -> Path:
    """The demo's output folder, created empty: ``--out``, or a fresh ``orthoccp-demo[-k]``."""
    if out is not None:
        p = Path(out)
        if p.exists() and (not p.is_dir() or any(p.iterdir())):
            raise oc.InputError(
                f"--out {out!r} exists and is not an empty folder; choose a new folder name."
            )
        p.mkdir(parents=True, exist_ok=True)
        return p
    k = 1
    while True:
        p = Path.cwd() / (DEMO_FOLDER if k == 1 else f"{DEMO_FOLDER}-{k}")
        try:
            p.mkdir()
        except FileExistsError:
            k += 1
            continue
        return p


def _comparison_table(
    truth: dict[str, float], plugin: oc.Results, debiased: oc.Results
) -> str:
    """Truth, both estimates with standard errors, and whether each 95 % interval covers."""
    tp, td = plugin.to_frame(0.95), debiased.to_frame(0.95)
    head = (
        f"{'parameter':<14}{'truth':>9}{'plug-in':>10}{'s.e.':>9}{'debiased':>10}{'s.e.':>9}"
        f"{'plug-in covers':>16}{'debiased covers':>17}"
    )
    lines = ["Truth vs. estimates (95% intervals):", head, "-" * len(head)]

    def covers(row: pd.Series, value: float) -> str:
        return "yes" if row.ci_lower <= value <= row.ci_upper else "no"

    for name in td.index:
        value = float(truth[name])
        rp, rd = tp.loc[name], td.loc[name]
        lines.append(
            f"{str(name):<14}{value:>9.4f}{rp.estimate:>10.4f}{rp.std_error:>9.4f}"
            f"{rd.estimate:>10.4f}{rd.std_error:>9.4f}"
            f"{covers(rp, value):>16}{covers(rd, value):>17}"
        )
    lines.append("-" * len(head))
    lines.append(
        "The plug-in standard errors treat the cross-fitted CCPs as known; the debiased "
        "(orthogonal) estimator's standard errors include the first-stage noise."
    )
    return "\n".join(lines)


def _cmd_demo(args: argparse.Namespace) -> int:
    from .simulate import simulate

    progress = _Progress()
    if args.folds < 2:
        raise oc.InputError(f"--folds must be an integer >= 2, got {args.folds}.")
    progress.stage(f"simulating {DEMO_SCENARIO!r}: {args.units} units x {args.periods} periods")
    sim = simulate(DEMO_SCENARIO, units=args.units, periods=args.periods, seed=args.seed)
    folder = _demo_folder(args.out)
    data_path = folder / f"{DEMO_SCENARIO}.csv"
    spec_path = folder / f"{DEMO_SCENARIO}.toml"
    progress.stage(f"writing {data_path} and {spec_path}")
    write_data(sim.data, data_path)
    document = _simulation_spec(
        sim, data_file=data_path.name, learner=args.learner, folds=args.folds, seed=args.seed
    )
    write_spec(spec_path, document, header=_truth_header(sim, command="demo"))

    # Estimate from the written files, exactly as the rerun command will.
    spec = read_spec(spec_path)
    frame = spec.load_data()
    panel = spec.build_panel(frame)
    model = spec.build_model(panel)
    options = spec.estimate_options()
    progress.stage(f"estimating (debiased) with {args.learner}, {args.folds} folds")
    debiased = oc.estimate(panel, model, **{**options, "debias": True})
    progress.stage("estimating (plug-in)")
    plugin_options = {k: v for k, v in options.items() if k != "moments"}
    plugin = oc.estimate(panel, model, **{**plugin_options, "debias": False})
    report_path = None
    if args.learner != "logit":
        from .compare import Comparison, difference_test
        from .report import write_report

        progress.stage("estimating (debiased) with the parametric logit first stage")
        parametric = oc.estimate(panel, model, **{**options, "learner": "logit", "debias": True})
        cmp = Comparison(
            results={"logit": parametric, args.learner: debiased},
            baseline="logit",
            tests={args.learner: difference_test(debiased, parametric)},
        )
        report_path = folder / "report.html"
        progress.stage(f"writing {report_path}")
        write_report(cmp, report_path, truth=dict(sim.truth), title="orthoccp demo report")

    print(
        f"orthoccp demo: simulated the {DEMO_SCENARIO!r} renewal scenario ({args.units} "
        f"{sim.unit}s x {args.periods} {sim.period}s, seed {args.seed}); wrote "
        f"{_display_path(data_path)} ({len(sim.data)} rows) and {_display_path(spec_path)}"
    )
    print()
    print(debiased.summary())
    print()
    print(_comparison_table(dict(sim.truth), plugin, debiased))
    print()
    print(
        f"Finished in {progress.elapsed:.1f}s. Rerun the debiased estimate on the same files with:"
    )
    print(f"  {_rerun_command(data_path, spec_path)}")
    print("(add --naive for the plug-in estimator, --json results.json to save the results)")
    if report_path is not None:
        print(
            f"Wrote {_display_path(report_path)}: {args.learner} against the parametric logit "
            f"first stage, with diagnostics and figures (open it in a browser)."
        )
    return 0


# --------------------------------------------------------------------------- montecarlo
def _estimator_list(text: str) -> tuple[str, ...]:
    from .montecarlo import ESTIMATORS

    names = tuple(part.strip() for part in text.split(",") if part.strip())
    unknown = [n for n in names if n not in ESTIMATORS]
    if not names or unknown or len(set(names)) != len(names):
        raise argparse.ArgumentTypeError(
            f"expected distinct names from {','.join(ESTIMATORS)} separated by commas, "
            f"got {text!r}"
        )
    return names


def _file_option(option: str, value: str | None) -> Path | None:
    """A file-name option (no '-' for stdout), checked before the run."""
    if value is None:
        return None
    p = Path(value)
    if p.is_dir():
        raise oc.InputError(f"{option} {value!r} is a folder; give a file name.")
    return p


def _cmd_montecarlo(args: argparse.Namespace) -> int:
    from .montecarlo import run_montecarlo

    out = Path(args.out)
    if out.suffix.lower() != ".json":
        raise oc.InputError(
            f"--out {args.out!r} must be a .json file name (the summary CSV is written beside "
            f"it with the extension .csv)."
        )
    if out.is_dir():
        raise oc.InputError(f"--out {args.out!r} is a folder; give a file name such as mc.json.")
    csv_path = out.with_suffix(".csv")
    raw_path = _file_option("--replications", args.replications)
    plot_path = _file_option("--plot", args.plot)
    if plot_path is not None:
        # Fail now rather than after a long run.
        try:
            import matplotlib  # noqa: F401
        except ImportError as exc:
            raise oc.InputError(
                "--plot needs matplotlib, an optional dependency: pip install "
                "'orthoccp[plot]' (or pip install matplotlib), or leave out --plot."
            ) from exc
    moments = None if args.moments == "auto" else args.moments
    mc = run_montecarlo(
        args.scenario,
        reps=args.reps,
        units=args.units,
        periods=args.periods,
        learner=args.learner,
        folds=args.folds,
        seed=args.seed,
        jobs=args.jobs,
        moments=moments,
        estimators=args.estimators,
        n_covariates=args.covariates,
        model_ccp_steps=args.model_ccp_steps,
    )
    print(mc.table())
    failures = {k: v for k, v in mc.failures.items() if v}
    if failures:
        text = ", ".join(f"{k} {v} of {mc.reps}" for k, v in failures.items())
        print(f"failed estimates (counted as failures, left out of the statistics): {text}")
    written = [mc.to_json(out), mc.to_csv(csv_path)]
    if raw_path is not None:
        written.append(mc.to_csv(raw_path, which="replications"))
    if plot_path is not None:
        written.append(mc.plot(plot_path))
    names = ", ".join(_display_path(p) for p in written)
    print(f"finished in {mc.wall_seconds:.1f}s with {mc.jobs} worker(s); wrote {names}")
    return 0


# --------------------------------------------------------------------------- parser
_MAIN_EPILOG = """\
examples:
  orthoccp demo
      simulate the e-bike renewal scenario, estimate it debiased and plug-in, compare with
      the truth, and write the data and spec to ./orthoccp-demo/
  orthoccp simulate ebike --units 1000 --periods 12 --seed 0 --out panel.csv
  orthoccp estimate panel.csv --spec panel.toml --json results.json
  orthoccp compare panel.csv --spec panel.toml --with logit --with lightgbm
  orthoccp report panel.csv --spec panel.toml --out report.html
  orthoccp montecarlo ebike --reps 50 --units 500 --learner logit --out mc.json
  orthoccp estimate --help

exit codes: 0 success, 2 usage or input error, 1 estimation failure.
"""

_DEMO_EPILOG = """\
examples:
  orthoccp demo
  orthoccp demo --units 500 --periods 8 --seed 3 --out my-demo
  orthoccp demo --learner logit --folds 3      # a faster first stage

The folder receives ebike.csv (the panel) and ebike.toml (its spec, with the true
parameters in a comment); the demo prints the command that reruns the estimate on them.
Unless --learner is logit, it also writes report.html: the learner against the parametric
logit first stage, the truth, diagnostics and figures (figures need matplotlib).
"""

_SIMULATE_EPILOG = """\
examples:
  orthoccp simulate ebike --units 1000 --periods 12 --seed 0 --out panel.csv
  orthoccp simulate producers --units 500 --out data/producers.parquet   # needs pyarrow
  orthoccp estimate panel.csv --spec panel.toml

Writes the panel (CSV or Parquet, by the extension of --out) and a spec file beside it
with the same name and the extension .toml. The spec's data path is relative to the spec;
its first-stage seed is --seed. The true parameters are in a comment at the top of the spec.
"""

_COMPARE_EPILOG = """\
examples:
  orthoccp compare panel.csv --spec panel.toml                      # logit vs the spec's learner
  orthoccp compare panel.csv --spec panel.toml --with logit --with lightgbm --with lasso_logit
  orthoccp compare panel.csv --spec panel.toml --json cmp.json --latex cmp.tex
"""

_REPORT_EPILOG = """\
examples:
  orthoccp report panel.csv --spec panel.toml --out report.html
  orthoccp report panel.csv --spec panel.toml --with logit --with lightgbm --out report.html
  orthoccp report panel.csv --spec panel.toml --out report.html --no-stability   # faster
"""

_ESTIMATE_EPILOG = """\
examples:
  orthoccp estimate panel.csv --spec panel.toml
  orthoccp estimate panel.csv --spec panel.toml --json results.json --latex table.tex
  orthoccp estimate --spec panel.toml --naive          # data path taken from the spec
  orthoccp estimate panel.csv --spec panel.toml --learner logit --folds 3 --seed 1
  orthoccp estimate panel.csv --spec panel.toml --json - | python -m json.tool

spec file (TOML):
  [data]
  unit = "bike"                    # column of the decision maker
  period = "week"                  # integer period column
  choice = "action"                # chosen alternative
  states = ["wear", "x0", "x1"]    # columns the first-stage learners see
  path = "panel.csv"               # optional; relative to the spec; DATA overrides it
  [model]
  kind = "renewal"                 # or "terminal"
  anchor = "swap"
  discount = 0.95
  persistent = ["x0", "x1"]        # optional: states a renewal does not reset
  [utility.keep]                   # one table per choice: parameter = column
  wear_cost = "wear_scaled"
  [utility.swap]
  swap_cost = "1"                  # "1" is a constant
  [first_stage]                    # optional: learner, regressor, folds, seed, splits,
  learner = "lightgbm"             #   scheme ("plain"/"nested"), clip
  [inference]                      # optional: cov, small_sample, debias,
  moments = "renewal_robust"       #   moments ("renewal_robust"/"standard")
  [estimator]                      # optional: method = "npl"/"pml" for discrete states
"""


_MONTECARLO_EPILOG = """\
examples:
  orthoccp montecarlo ebike --reps 50 --units 500 --periods 12 --learner logit --out mc.json
  orthoccp montecarlo producers --reps 200 --units 2000 --jobs 2 --out mc.json --plot mc.png
  orthoccp montecarlo ebike3 --reps 20 --moments standard --estimators debiased,oracle \\
      --out mc.json --replications mc-replications.csv

Each replication simulates a fresh panel and runs, on the same data, the plug-in ("naive")
estimator, the debiased estimator and the oracle (plug-in with the simulator's exact
nuisances). Writes the JSON (settings, summary and every replication) to --out and the
summary CSV (one row per estimator and parameter) beside it with the extension .csv.
Replication r's seeds depend on --seed and r only, so --jobs does not change the numbers;
learners run single-threaded in each worker. Failed estimates are counted, not dropped.
"""


def build_parser() -> argparse.ArgumentParser:
    """The ``orthoccp`` argument parser with its six sub-commands.

    Returns
    -------
    argparse.ArgumentParser
    """
    parser = _Parser(
        prog=PROG,
        description=(
            "Cross-fitted, Neyman-orthogonal CCP estimation of dynamic discrete choice "
            "models with machine-learning first stages."
        ),
        epilog=_MAIN_EPILOG,
        formatter_class=_Formatter,
    )
    parser.add_argument("--version", action="version", version=f"{PROG} {__version__}")
    debug_help = "show tracebacks and all warnings"
    parser.add_argument("--debug", action="store_true", default=False, help=debug_help)
    # Accept --debug after the command too, without overriding one given before it.
    common = _Parser(add_help=False)
    common.add_argument("--debug", action="store_true", default=argparse.SUPPRESS, help=debug_help)
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    learners = oc.learner_names()

    demo = sub.add_parser(
        "demo",
        parents=[common],
        help="simulate, estimate and compare with the truth (no arguments needed)",
        description=(
            f"Simulate the built-in {DEMO_SCENARIO!r} renewal scenario, estimate it debiased "
            "and plug-in, print the summary and a truth-vs-estimates table, and write the data "
            "(CSV) and the spec (TOML) so that 'orthoccp estimate' can be rerun on them."
        ),
        epilog=_DEMO_EPILOG,
        formatter_class=_Formatter,
    )
    demo.add_argument(
        "--units", type=int, default=2000, metavar="N", help="simulated units (default: 2000)"
    )
    demo.add_argument(
        "--periods", type=int, default=12, metavar="T", help="periods per unit (default: 12)"
    )
    demo.add_argument(
        "--seed",
        type=int,
        default=0,
        metavar="S",
        help="seed of the simulation and of the estimation (default: 0)",
    )
    demo.add_argument(
        "--out",
        metavar="FOLDER",
        default=None,
        help=f"output folder, new or empty (default: a fresh ./{DEMO_FOLDER}, "
        f"./{DEMO_FOLDER}-2, ...)",
    )
    demo.add_argument(
        "--learner",
        choices=learners,
        default="lightgbm",
        help="first-stage learner (default: lightgbm)",
    )
    demo.add_argument(
        "--folds", type=int, default=5, metavar="K", help="cross-fitting folds (default: 5)"
    )
    demo.set_defaults(handler=_cmd_demo)

    from .simulate import scenario_names

    scenarios = scenario_names()
    simulate = sub.add_parser(
        "simulate",
        parents=[common],
        help="write a simulated panel and its spec file",
        description=(
            "Simulate one of the built-in scenarios and write the panel and a matching spec "
            "file beside it."
        ),
        epilog=_SIMULATE_EPILOG,
        formatter_class=_Formatter,
    )
    simulate.add_argument(
        "scenario", metavar="SCENARIO", choices=scenarios, help="one of: " + ", ".join(scenarios)
    )
    simulate.add_argument(
        "--units", type=int, default=1000, metavar="N", help="units (default: 1000)"
    )
    simulate.add_argument(
        "--periods", type=int, default=12, metavar="T", help="periods (default: 12)"
    )
    simulate.add_argument(
        "--seed",
        type=int,
        default=0,
        metavar="S",
        help="seed of the simulation, also written as first_stage.seed (default: 0)",
    )
    simulate.add_argument(
        "--out",
        required=True,
        metavar="FILE",
        help="panel file: .csv or .parquet (Parquet needs pyarrow)",
    )
    simulate.add_argument(
        "--discount",
        type=float,
        default=None,
        metavar="BETA",
        help="discount factor in [0, 1) (default: the scenario's, 0.95)",
    )
    simulate.add_argument(
        "--covariates",
        type=int,
        default=None,
        metavar="P",
        help="number of covariates x0, x1, ... (default: the scenario's)",
    )
    simulate.set_defaults(handler=_cmd_simulate)

    est = sub.add_parser(
        "estimate",
        parents=[common],
        help="estimate a model described by a spec file",
        description=(
            "Estimate the model described by SPEC on the panel DATA and print the summary. "
            "Progress goes to stderr when it is a terminal."
        ),
        epilog=_ESTIMATE_EPILOG,
        formatter_class=_Formatter,
    )
    est.add_argument(
        "data",
        metavar="DATA",
        nargs="?",
        default=None,
        help="panel file (.csv or .parquet); default: data.path in the spec",
    )
    est.add_argument("--spec", required=True, metavar="SPEC", help="spec file (TOML)")
    est.add_argument(
        "--json",
        metavar="OUT",
        default=None,
        help="write the results as JSON ('-' for stdout, without the summary)",
    )
    est.add_argument(
        "--latex",
        metavar="OUT",
        default=None,
        help="write a LaTeX table of the estimates ('-' for stdout)",
    )
    est.add_argument(
        "--naive",
        action="store_true",
        help="plug-in estimator (debias = false); its standard errors ignore first-stage noise",
    )
    est.add_argument(
        "--learner", choices=learners, default=None, help="override first_stage.learner"
    )
    est.add_argument(
        "--folds", type=int, default=None, metavar="K", help="override first_stage.folds"
    )
    est.add_argument(
        "--seed", type=int, default=None, metavar="S", help="override first_stage.seed"
    )
    est.set_defaults(handler=_cmd_estimate)

    for name in ("compare", "report"):
        is_report = name == "report"
        cp = sub.add_parser(
            name,
            parents=[common],
            help=(
                "one self-contained HTML page: comparison, diagnostics, figures, assumptions"
                if is_report
                else "the same model with several first stages, side by side, with equality tests"
            ),
            description=(
                "Estimate the model of SPEC on DATA with several first stages (all debiased) and "
                "test each against the baseline (the first --with) using both estimators' "
                "per-unit influence terms."
                + (
                    " Write one HTML page with the comparison, every first stage's diagnostics "
                    "and figures, the fold stability of the non-baseline first stages, and the "
                    "assumptions; it opens in a browser with no network."
                    if is_report
                    else ""
                )
            ),
            epilog=_REPORT_EPILOG if is_report else _COMPARE_EPILOG,
            formatter_class=_Formatter,
        )
        cp.add_argument(
            "data", metavar="DATA", nargs="?", default=None,
            help="panel file (.csv or .parquet); default: data.path in the spec",
        )
        cp.add_argument("--spec", required=True, metavar="SPEC", help="spec file (TOML)")
        cp.add_argument(
            "--with", dest="first_stages", action="append", choices=learners, metavar="LEARNER",
            help=(
                "a first stage (repeatable; one of " + ", ".join(learners) + "); default: logit "
                "and the spec's learner"
            ),
        )
        cp.add_argument(
            "--baseline", default=None, metavar="LEARNER",
            help="the first stage the others are tested against (default: the first --with)",
        )
        cp.add_argument("--folds", type=int, default=None, metavar="K", help="override first_stage.folds")
        cp.add_argument("--seed", type=int, default=None, metavar="S", help="override first_stage.seed")
        if is_report:
            cp.add_argument("--out", required=True, metavar="OUT", help="the HTML file to write")
            cp.add_argument(
                "--no-stability", dest="stability", action="store_false",
                help="skip the fold-stability refits (they cost one more first stage per learner)",
            )
            cp.set_defaults(handler=_cmd_report)
        else:
            for opt, what in (("--json", "JSON"), ("--latex", "a LaTeX table"), ("--html", "an HTML table")):
                cp.add_argument(opt, metavar="OUT", default=None, help=f"write the comparison as {what}")
            cp.set_defaults(handler=_cmd_compare)

    mc = sub.add_parser(
        "montecarlo",
        parents=[common],
        help="replicate a scenario: bias, SD, SE, RMSE and coverage of each estimator",
        description=(
            "Replicate a built-in scenario and compare the plug-in, debiased and oracle "
            "estimators: per parameter bias, SD, mean SE, SD/SE, RMSE, coverage of the 95% "
            "interval with its Monte Carlo standard error, runtime and failures. A counter "
            "goes to stderr when it is a terminal."
        ),
        epilog=_MONTECARLO_EPILOG,
        formatter_class=_Formatter,
    )
    mc.add_argument(
        "scenario", metavar="SCENARIO", choices=scenarios, help="one of: " + ", ".join(scenarios)
    )
    mc.add_argument(
        "--reps", type=int, default=100, metavar="R", help="replications (default: 100)"
    )
    mc.add_argument(
        "--units",
        type=int,
        default=1000,
        metavar="N",
        help="units per replication (default: 1000)",
    )
    mc.add_argument(
        "--periods", type=int, default=12, metavar="T", help="periods per unit (default: 12)"
    )
    mc.add_argument(
        "--learner",
        choices=learners,
        default="lightgbm",
        help="first-stage learner, single-threaded (default: lightgbm)",
    )
    mc.add_argument(
        "--folds",
        type=int,
        default=5,
        metavar="K",
        help="cross-fitting folds, at least 3 (default: 5)",
    )
    mc.add_argument(
        "--seed", type=int, default=0, metavar="S", help="seed of the whole run (default: 0)"
    )
    mc.add_argument(
        "--jobs",
        type=int,
        default=1,
        metavar="J",
        help="worker processes, -1 for all cores (default: 1)",
    )
    mc.add_argument(
        "--moments",
        choices=["auto", "standard", "renewal_robust"],
        default="auto",
        help="moments of the debiased estimator; auto: renewal_robust for the renewal "
        "scenarios, standard for producers (default: auto)",
    )
    mc.add_argument(
        "--estimators",
        type=_estimator_list,
        default=("naive", "debiased", "oracle"),
        metavar="LIST",
        help="comma-separated subset of naive,debiased,oracle,oracle_debiased (default: "
        "naive,debiased,oracle; oracle_debiased is the corrected moment at the true nuisances)",
    )
    mc.add_argument(
        "--covariates",
        type=int,
        default=None,
        metavar="P",
        help="covariates per unit (default: the scenario's)",
    )
    mc.add_argument(
        "--model-ccp-steps",
        type=int,
        default=0,
        metavar="K",
        help="model-implied CCP steps of the debiased estimator (needs the standard moment; "
        "default: 0)",
    )
    mc.add_argument(
        "--out",
        required=True,
        metavar="FILE.json",
        help="results JSON; the summary CSV goes beside it as FILE.csv",
    )
    mc.add_argument(
        "--replications",
        metavar="FILE.csv",
        default=None,
        help="also write the per-replication records as CSV",
    )
    mc.add_argument(
        "--plot",
        metavar="FILE.png",
        default=None,
        help="also write the coverage and interval-length plot (PNG; needs matplotlib)",
    )
    mc.set_defaults(handler=_cmd_montecarlo)
    return parser


def _exit_code(code: Any) -> int:
    if code is None:
        return 0
    if isinstance(code, int):
        return code
    print(code, file=sys.stderr)
    return 1


def main(argv: Sequence[str] | None = None) -> int:
    """Run the ``orthoccp`` command line.

    Parameters
    ----------
    argv : sequence of str, optional
        Arguments without the program name; ``sys.argv[1:]`` when omitted.

    Returns
    -------
    int
        Exit code: 0 success, 2 usage or input error, 1 estimation failure or unexpected
        error.
    """
    args_list = list(sys.argv[1:] if argv is None else argv)
    parser = build_parser()
    try:
        args = parser.parse_args(args_list)
    except _UsageError as exc:
        print(f"{PROG}: error: {_one_line(str(exc))}", file=sys.stderr)
        return 2
    except SystemExit as exc:  # --help and --version
        return _exit_code(exc.code)
    debug = bool(getattr(args, "debug", False))
    # LightGBM's OpenMP threads spin while they wait by default; on a busy machine (other
    # processes on the same cores) that slows the first stage by an order of magnitude.
    # Passive waiting costs nothing measurable on an idle machine. The runtime reads this
    # when LightGBM is first loaded, which happens at the first fit; a user's setting wins.
    os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")
    handler: _Handler | None = getattr(args, "handler", None)
    if handler is None:
        print(
            f"{PROG}: error: choose a command: demo, simulate, estimate, compare, report or "
            f"montecarlo "
            f"(see '{PROG} --help')",
            file=sys.stderr,
        )
        return 2
    try:
        with _warnings_to_stderr(debug=debug):
            return handler(args)
    except oc.EstimationError as exc:
        _report(exc, debug=debug, prefix="estimation failed")
        return 1
    except (oc.InputError, FileNotFoundError, ValueError, pd.errors.ParserError) as exc:
        _report(exc, debug=debug)
        return 2
    except BrokenPipeError:
        # The reader of stdout went away (e.g. '| head'); stop quietly.
        with contextlib.suppress(OSError):
            devnull = os.open(os.devnull, os.O_WRONLY)
            os.dup2(devnull, sys.stdout.fileno())
        return 1
    except OSError as exc:
        _report(exc, debug=debug)
        return 2
    except KeyboardInterrupt:
        print(f"{PROG}: interrupted", file=sys.stderr)
        return 130
    except Exception as exc:  # noqa: BLE001 - last resort, keeps the one-line contract
        if debug:
            traceback.print_exception(type(exc), exc, exc.__traceback__, file=sys.stderr)
        print(
            f"{PROG}: internal error: {type(exc).__name__}: {_error_message(exc)} "
            f"(rerun with --debug for the traceback)",
            file=sys.stderr,
        )
        return 1


if __name__ == "__main__":
    raise SystemExit(main())
