"""The command handlers: demo, simulate, estimate, sensitivity, compare, report and montecarlo."""

from __future__ import annotations

import argparse
import shlex
import sys
import warnings
from collections.abc import Callable
from pathlib import Path
from typing import Any, TypeVar

import numpy as np
import pandas as pd

import orthoccp as oc

from .._outputs import check_outputs
from ..functions import check_functions
from ..spec import (
    Spec,
    SpecError,
    data_format,
    data_stem,
    read_spec,
    write_data,
    write_spec,
)
from ._plumbing import (
    DEMO_FOLDER,
    DEMO_SCENARIO,
    PROG,
    _display_path,
    _dumps,
    _one_line,
    _output_path,
    _Progress,
    _write_text,
    name_value_pairs,
    parse_functions,
    results_payload,
    write_outputs,
)


def _require_matplotlib(what: str) -> None:
    """Fail before the work when matplotlib (a dependency) does not import."""
    from ..figures import matplotlib_figure_class

    try:
        matplotlib_figure_class()
    except ImportError as exc:
        raise oc.InputError(f"{what}: {exc}") from exc


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


def _load_panel(
    args: argparse.Namespace, spec: Spec, progress: _Progress,
    outputs: dict[str, Path | None] | None = None,
) -> tuple[Path, oc.Panel]:
    """The data file and its panel; ``outputs`` are checked first (writable, distinct from
    each other and from the data and spec files), before the data are read."""
    data_path = spec.data_path(args.data)
    check_outputs(outputs or {}, inputs={"data file": data_path, "--spec": args.spec})
    progress.stage(f"reading the data {data_path}")
    frame = spec.load_data(args.data)
    progress.stage(f"checking {len(frame)} rows against the spec")
    return data_path, _build_panel(spec, frame, data_path)


def _read_inputs(
    args: argparse.Namespace, progress: _Progress, outputs: dict[str, Path | None],
    **overrides: Any,
) -> tuple[Path, oc.Panel, oc.Model, dict[str, Any]]:
    """Spec (with command-line overrides), data, panel, model and the estimate options;
    ``outputs`` checked before the data are read (:func:`_load_panel`)."""
    spec = _read_spec(args, progress, **overrides)
    if spec.estimator.discrete:
        raise oc.InputError(
            f"this command runs the orthogonal estimator; the spec selects estimator.method = "
            f"{spec.estimator.method!r}. Use 'orthoccp estimate' for it."
        )
    data_path, panel = _load_panel(args, spec, progress, outputs)
    model = spec.build_model(panel)
    return data_path, panel, model, spec.estimate_options()


def _cmd_estimate(args: argparse.Namespace) -> int:
    progress = _Progress()
    if args.json == "-" and args.latex == "-":
        raise oc.InputError(
            "--json - and --latex - both write to stdout, where the JSON document must stand "
            "alone; write one of them to a file."
        )
    json_path = _output_path("--json", args.json)
    latex_path = _output_path("--latex", args.latex)
    check_outputs({"--json": json_path, "--latex": latex_path})  # before reading anything
    functions = parse_functions(args.function)
    overrides = dict(learner=args.learner, debias=False if args.naive else None)
    spec = _read_spec(args, progress, **overrides)
    data_path, panel = _load_panel(args, spec, progress,
                                   {"--json": json_path, "--latex": latex_path})
    if spec.estimator.discrete:
        progress.stage(f"estimating by {spec.estimator.method.upper()} on the discrete states")
        res: oc.Results = oc.estimate_discrete(
            panel, utility=spec.build_utility(panel), **spec.discrete_options(panel)
        )
    else:
        model = spec.build_model(panel)
        if functions:  # names and syntax checked before the estimate runs
            check_functions(functions, list(model.parameters))
        options = spec.estimate_options()
        method = "debiased" if options.get("debias", True) else "plug-in"
        progress.stage(
            f"estimating ({method}): cross-fitted first stage with "
            f"{options.get('learner', 'the default learner')}, then the second stage"
        )
        res = oc.estimate(panel, model, **options)
    progress.stage("writing the results")
    payload = results_payload(res, inputs={"data": str(data_path), "spec": str(args.spec)},
                              functions=functions)
    # With '--json -' stdout carries the JSON document only.
    json_on_stdout = args.json == "-"
    if json_on_stdout:
        sys.stdout.write(_dumps(payload))
    else:
        print(res.summary(functions=functions))
    if args.latex == "-":
        sys.stdout.write(res.to_latex() + "\n")
    for path, text in ((json_path, _dumps(payload)), (latex_path, res.to_latex() + "\n")):
        if path is not None:
            _write_text(path, text)
            if not json_on_stdout:
                print(f"wrote {path}")
    progress.stage(f"done in {progress.elapsed:.1f}s")
    return 0


# --------------------------------------------------------------------------- counterfactual
def _assignments(items: list[str] | None, option: str, example: str) -> dict[str, float]:
    """``--set a=1 --shift swap=0.5`` as a mapping of names to finite numbers."""
    out: dict[str, float] = {}
    for name, value in name_value_pairs(items, option, example).items():
        try:
            out[name] = float(value)
        except ValueError:
            out[name] = float("nan")
        if not np.isfinite(out[name]):
            raise oc.InputError(f"{option} {name}={value}: the value must be a finite number.")
    return out


def _cmd_counterfactual(args: argparse.Namespace) -> int:
    progress = _Progress()
    outputs = {"--json": _output_path("--json", args.json),
               "--csv": _output_path("--csv", args.csv)}
    check_outputs(outputs)
    changes = _assignments(args.set, "--set", "swap_cost=-4")
    shifts = _assignments(args.shift, "--shift", "swap=1.0")
    if not changes and not shifts:
        raise oc.InputError("give at least one change: --set PARAM=VALUE or --shift CHOICE=UTILS.")
    data_path, panel, model, options = _read_inputs(
        args, progress, outputs, learner=args.learner, debias=False if args.naive else None)
    # A choice label given on the command line is text; match it to the panel's labels.
    labels = {str(c): c for c in panel.choices}
    shift = {labels.get(k, k): v for k, v in shifts.items()}
    if args.results is not None:
        res = oc.Results.from_json(Path(args.results))
    else:
        progress.stage(f"estimating with {options.get('learner', 'the default learner')}")
        res = oc.estimate(panel, model, **options)
    progress.stage(f"solving the baseline and the counterfactual ({args.averager} averager)")
    cf = oc.counterfactual(res, panel, model, set=changes or None, shift=shift or None,
                           money=args.money, averager=args.averager,
                           seed=int(options.get("seed", 0)))
    print(cf.summary())
    table = cf.table.reset_index()
    doc = {"inputs": {"data": str(data_path), "spec": str(args.spec),
                      "results": args.results},
           "changes": cf.changes, "noise": cf.noise, "averager": cf.averager.kind,
           "iterations": cf.iterations, "rows": table.to_dict(orient="records")}
    write_outputs(outputs, {"--json": lambda p: _write_text(p, _dumps(doc)),
                            "--csv": lambda p: _write_text(p, table.to_csv(index=False))})
    progress.stage(f"done in {progress.elapsed:.1f}s")
    return 0


# --------------------------------------------------------------------------- sensitivity
def _discount_list(text: str) -> list[float]:
    """``--discounts 0.9,0.95,0.99``: numbers separated by commas (checked by the function)."""
    try:
        return [float(part) for part in text.split(",") if part.strip()]
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"expected discount factors separated by commas, e.g. 0.9,0.95,0.99; got {text!r}"
        ) from None


def _cmd_sensitivity(args: argparse.Namespace) -> int:
    from ..sensitivity import discount_sensitivity

    progress = _Progress()
    outputs = {"--json": _output_path("--json", args.json),
               "--csv": _output_path("--csv", args.csv),
               "--plot": _output_path("--plot", args.plot)}
    if outputs["--plot"] is not None and outputs["--plot"].suffix.lower() not in (
            ".png", ".svg", ".pdf"):
        raise oc.InputError(f"--plot {args.plot!r} must end in .png, .svg or .pdf.")
    check_outputs(outputs)
    data_path, panel, model, options = _read_inputs(
        args, progress, outputs, learner=args.learner, debias=False if args.naive else None)
    progress.stage(
        f"estimating at {len(args.discounts)} discount factors (the first stage once, with "
        f"{options.get('learner', 'the default learner')})"
    )
    sens = discount_sensitivity(panel, model, discounts=args.discounts, **options)
    print(sens.summary())
    table = sens.to_frame()
    doc = {
        "inputs": {"data": str(data_path), "spec": str(args.spec)},
        "assumed_discount": sens.assumed,
        "level": sens.level,
        "first_stage_fits": sens.first_stage_fits,
        "rows": table.to_dict(orient="records"),
    }
    write_outputs(outputs, {
        "--json": lambda p: _write_text(p, _dumps(doc)),
        "--csv": lambda p: _write_text(p, table.to_csv(index=False)),
        "--plot": lambda p: sens.plot(path=p),
    })
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
    args: argparse.Namespace, progress: _Progress, outputs: dict[str, Path | None]
) -> tuple[Path, oc.Panel, oc.Model, dict[str, Any], oc.Comparison]:
    check_outputs(outputs)  # before reading anything; again with the inputs below
    data_path, panel, model, options = _read_inputs(args, progress, outputs)
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
    data_path, _, _, _, cmp = _run_comparison(args, progress, outputs)
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
        "failed": dict(cmp.failed),
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
    from ..report import write_report
    from ..stability import fold_stability

    progress = _Progress()
    out = Path(args.out)
    if out.suffix.lower() not in (".html", ".htm"):
        raise oc.InputError(f"--out {args.out!r} must be an .html file name.")
    _require_matplotlib("the report's figures")
    changes = _assignments(args.set, "--set", "swap_cost=-4")  # checked before any work
    shifts = _assignments(args.shift, "--shift", "swap=1.0")
    data_path, panel, model, options, cmp = _run_comparison(args, progress, {"--out": out})
    stability = {}
    if args.stability:
        for label in cmp.results:
            if label == cmp.baseline:
                continue
            progress.stage(f"fold stability of {label}: refitting each fold with another seed")
            stability[label] = fold_stability(panel, model, learner=label, **options)
    sensitivity = None
    if args.discounts is not None:
        from ..report import favoured_first_stage
        from ..sensitivity import discount_sensitivity

        label = favoured_first_stage(cmp, stability=stability)[0] or list(cmp.results)[-1]
        progress.stage(f"sensitivity to the discount factor with {label}")
        sensitivity = discount_sensitivity(panel, model, discounts=args.discounts,
                                           learner=label, **options)
    cf = None
    if changes or shifts:
        from ..report import favoured_first_stage

        label = favoured_first_stage(cmp, stability=stability)[0] or list(cmp.results)[-1]
        progress.stage(f"counterfactual with {label}")
        labels = {str(c): c for c in panel.choices}
        cf = oc.counterfactual(cmp.results[label], panel, model, set=changes or None,
                               shift={labels.get(k, k): v for k, v in shifts.items()} or None,
                               seed=int(options.get("seed", 0)))
    progress.stage(f"writing {out}")
    provenance = {"data file": str(data_path), "spec file": str(args.spec),
                  "command": shlex.join(getattr(args, "command_line", [PROG, "report"]))}
    write_report(cmp, out, stability=stability, panel=panel, sensitivity=sensitivity,
                 provenance=provenance, counterfactual=cf)
    print(cmp.summary())
    for label, fs in stability.items():
        print(f"{label}: {fs.reading()}")
    print(f"wrote {out}")
    progress.stage(f"done in {progress.elapsed:.1f}s")
    return 0


# --------------------------------------------------------------------------- simulate
def _cmd_simulate(args: argparse.Namespace) -> int:
    from ..simulate import simulate

    progress = _Progress()
    out = Path(args.out)
    data_format(out, writing=True)
    spec_path = data_stem(out).with_suffix(".toml")
    check_outputs({"--out": out, "the spec file written beside --out": spec_path})
    size = (
        f"{'default' if args.units is None else args.units} units x "
        f"{'default' if args.periods is None else args.periods} periods"
    )
    progress.stage(f"simulating {args.scenario!r}: {size}")
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
    n_units = int(sim.data[sim.unit].nunique())
    print(f"wrote {out} ({len(sim.data)} rows, {n_units} units) and {spec_path}")
    print(
        f"scenario {args.scenario!r}: {sim.kind} model, anchor {sim.anchor!r}, discount "
        f"{sim.discount:g}; true parameters: {truth}"
    )
    if sim.description:
        print(f"design: {sim.description}")
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
        "plug-in: a separate run of the uncorrected standard moment on the same learner and "
        "folds; debiased: the summary above."
    )
    lines.append(
        "The plug-in standard errors treat the cross-fitted CCPs as known; the debiased "
        "(orthogonal) estimator's standard errors include the first-stage noise."
    )
    return "\n".join(lines)


_T = TypeVar("_T")


def _with_warnings(run: Callable[[], _T]) -> tuple[_T, list[str]]:
    """Run ``run`` and keep orthoccp's warnings (one line each, once) to print under its output.

    Other warnings are passed on to the command's handler (shown with ``--debug``).
    """
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        value = run()
    lines: list[str] = []
    for w in caught:
        if issubclass(w.category, oc.OrthoCCPWarning):
            text = _one_line(str(w.message))
            if text not in lines:
                lines.append(text)
        else:
            warnings.showwarning(w.message, w.category, w.filename, w.lineno)
    return value, lines


def _print_warnings(run: str, lines: list[str], *, shown: str = "") -> None:
    """The warnings of one run, under that run's output and naming it.

    A warning whose text the output above already printed (``shown``) is not repeated.
    """
    shown = _one_line(shown)
    new = [t for t in lines if t.split(" [first stage ")[0].rstrip(".") not in shown]
    if new:
        print(f"Warnings from {run}:")
        for text in new:
            print(f"  - {text}")


def _cmd_demo(args: argparse.Namespace) -> int:
    from ..simulate import simulate

    progress = _Progress()
    if args.folds < 3:
        raise oc.InputError(
            f"--folds must be an integer >= 3 (the demo's nested cross-fitting fits the CCP on "
            f"the folds outside each pair), got {args.folds}."
        )
    progress.stage(f"simulating {DEMO_SCENARIO!r}: {args.units} units x {args.periods} periods")
    sim, sim_warnings = _with_warnings(
        lambda: simulate(DEMO_SCENARIO, units=args.units, periods=args.periods, seed=args.seed)
    )
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
    debiased, debiased_warnings = _with_warnings(
        lambda: oc.estimate(panel, model, **{**options, "debias": True})
    )
    progress.stage("estimating (plug-in)")
    plugin_options = {k: v for k, v in options.items() if k != "moments"}
    plugin, plugin_warnings = _with_warnings(
        lambda: oc.estimate(panel, model, **{**plugin_options, "debias": False})
    )
    report_path = None
    parametric_warnings: list[str] = []
    if args.learner != "logit":
        from ..compare import Comparison, difference_test
        from ..report import write_report

        progress.stage("estimating (debiased) with the parametric logit first stage")
        parametric, parametric_warnings = _with_warnings(
            lambda: oc.estimate(panel, model, **{**options, "learner": "logit", "debias": True})
        )
        cmp = Comparison(
            results={"logit": parametric, args.learner: debiased},
            baseline="logit",
            tests={args.learner: difference_test(debiased, parametric)},
        )
        report_path = folder / "report.html"
        progress.stage(f"writing {report_path}")
        write_report(cmp, report_path, truth=dict(sim.truth), title="orthoccp demo report",
                     panel=panel, provenance={"data file": str(data_path),
                                              "spec file": str(spec_path),
                                              "command": "orthoccp demo"})

    print(
        f"orthoccp demo: simulated the {DEMO_SCENARIO!r} renewal scenario ({args.units} "
        f"{sim.unit}s x {args.periods} {sim.period}s, seed {args.seed}); wrote "
        f"{_display_path(data_path)} ({len(sim.data)} rows) and {_display_path(spec_path)}"
    )
    _print_warnings("the simulation", sim_warnings)
    print()
    # The plug-in estimate is shown once, in the table below, from its own run.
    summary = debiased.summary(plugin=False)
    print(summary)
    _print_warnings(f"the debiased {args.learner} run (the summary above)", debiased_warnings,
                    shown=summary)
    print()
    print(_comparison_table(dict(sim.truth), plugin, debiased))
    _print_warnings(f"the plug-in {args.learner} run (the table's plug-in columns)",
                    plugin_warnings)
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
        _print_warnings("the parametric logit run (in the report only)", parametric_warnings)
    return 0


# --------------------------------------------------------------------------- montecarlo
def _estimator_list(text: str) -> tuple[str, ...]:
    from ..montecarlo import ESTIMATORS

    names = tuple(part.strip() for part in text.split(",") if part.strip())
    unknown = [n for n in names if n not in ESTIMATORS]
    if not names or unknown or len(set(names)) != len(names):
        raise argparse.ArgumentTypeError(
            f"expected distinct names from {','.join(ESTIMATORS)} separated by commas, "
            f"got {text!r}"
        )
    return names


def _cmd_montecarlo(args: argparse.Namespace) -> int:
    from ..montecarlo import run_montecarlo
    from ..montecarlo._settings import check_reps

    check_reps(args.reps, name="--reps")
    out = Path(args.out)
    if out.suffix.lower() != ".json":
        raise oc.InputError(
            f"--out {args.out!r} must be a .json file name (the summary CSV is written beside "
            f"it with the extension .csv)."
        )
    csv_path = out.with_suffix(".csv")
    raw_path = None if args.replications is None else Path(args.replications)
    plot_path = None if args.plot is None else Path(args.plot)
    check_outputs({"--out": out, "the summary CSV written beside --out": csv_path,
                   "--replications": raw_path, "--plot": plot_path})
    if plot_path is not None:
        _require_matplotlib("--plot")  # fail now rather than after a long run
    moments = None if args.moments == "auto" else args.moments
    units, periods = args.units, args.periods
    if units is None or periods is None:
        from ..simulate import family_design, is_family_id

        design = family_design(args.scenario) if is_family_id(args.scenario) else None
        if units is None:
            units = 1000 if design is None else design.units
        if periods is None:
            periods = 12 if design is None else design.periods
    mc = run_montecarlo(
        args.scenario,
        reps=args.reps,
        units=units,
        periods=periods,
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
