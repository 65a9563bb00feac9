"""The argument parser of every command, with its help texts."""

from __future__ import annotations

import argparse

import orthoccp as oc

from .._version import __version__
from ._commands import (
    _cmd_compare,
    _cmd_demo,
    _cmd_estimate,
    _cmd_montecarlo,
    _cmd_report,
    _cmd_counterfactual,
    _cmd_sensitivity,
    _cmd_simulate,
    _discount_list,
    _estimator_list,
)
from ._plumbing import DEMO_FOLDER, DEMO_SCENARIO, PROG, _Formatter, _Parser

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
  orthoccp sensitivity panel.csv --spec panel.toml --discounts 0.9,0.95,0.99 --plot beta.png
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
logit first stage, the truth, diagnostics and figures.
"""

_SIMULATE_EPILOG = """\
examples:
  orthoccp simulate ebike --units 1000 --periods 12 --seed 0 --out panel.csv
  orthoccp simulate producers --units 500 --out data/producers.parquet   # needs pyarrow
  orthoccp simulate F07 --seed 1 --out f07.csv    # family design F07 at its own N and T
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
  orthoccp report panel.csv --spec panel.toml --out report.html --discounts 0.9,0.95,0.99
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


_COUNTERFACTUAL_EPILOG = """\
examples:
  orthoccp counterfactual panel.csv --spec panel.toml --shift swap=1.0
  orthoccp counterfactual panel.csv --spec panel.toml --set swap_cost=-4 --money=-swap_cost \\
      --results results.json --csv cf.csv

Solves the estimated model at the changed payoffs on the data's own states (fitted value
iteration) and prints the choice shares, expected discounted counts and welfare for the
baseline, the counterfactual and their difference, with intervals. The estimate comes from
--results (a JSON written by 'orthoccp estimate --json' on the same data and spec) or is made
first. The intervals include the parameters' estimation noise and the sampling of units, not
the noise of the transition averager. See docs/counterfactuals.md.
"""


_SENSITIVITY_EPILOG = """\
examples:
  orthoccp sensitivity panel.csv --spec panel.toml --discounts 0.9,0.925,0.95,0.975
  orthoccp sensitivity panel.csv --spec panel.toml --discounts 0.9,0.95,0.99 \\
      --plot beta.png --csv beta.csv --json beta.json

Re-estimates the model of SPEC at each discount factor with the same first stage: the
cross-fitted CCPs and continuation regressions do not depend on the discount factor and are
fitted once; everything that does (the moments, renewal-robust projections, model-implied
steps) is redone. Each row equals 'orthoccp estimate' with model.discount set to that value.
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


def _scenario_name(value: str) -> str:
    """A built-in scenario name or a family design id (``F`` and the design seed)."""
    from ..simulate import is_family_id, scenario_names

    if value in scenario_names() or is_family_id(value):
        return value
    raise argparse.ArgumentTypeError(
        f"invalid choice: {value!r} (choose from {', '.join(map(repr, scenario_names()))}, or "
        f"a family design id such as 'F07')"
    )


def _add_data_and_spec(parser: argparse.ArgumentParser) -> None:
    """The positional ``DATA`` (optional) and ``--spec``."""
    parser.add_argument(
        "data", metavar="DATA", nargs="?", default=None,
        help="panel file (.csv or .parquet); default: data.path in the spec",
    )
    parser.add_argument("--spec", required=True, metavar="SPEC", help="spec file (TOML)")


def _add_spec_overrides(parser: argparse.ArgumentParser, learners: tuple[str, ...]) -> None:
    """``--naive``, ``--learner``, ``--folds`` and ``--seed``: the spec's settings overridden."""
    parser.add_argument(
        "--naive",
        action="store_true",
        help="plug-in estimator (debias = false); its standard errors ignore first-stage noise",
    )
    parser.add_argument(
        "--learner", choices=learners, default=None, help="override first_stage.learner"
    )
    parser.add_argument(
        "--folds", type=int, default=None, metavar="K", help="override first_stage.folds"
    )
    parser.add_argument(
        "--seed", type=int, default=None, metavar="S", help="override first_stage.seed"
    )


def build_parser() -> argparse.ArgumentParser:
    """The ``orthoccp`` argument parser with its eight sub-commands.

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

    from ..simulate import scenario_names

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
        "scenario",
        metavar="SCENARIO",
        type=_scenario_name,
        help="one of: " + ", ".join(scenarios) + ", or a family design id such as F07",
    )
    simulate.add_argument(
        "--units",
        type=int,
        default=None,
        metavar="N",
        help="units (default: 1000; a family design's own N)",
    )
    simulate.add_argument(
        "--periods",
        type=int,
        default=None,
        metavar="T",
        help="periods (default: 12; a family design's own T)",
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
    _add_data_and_spec(est)
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
        "--function",
        metavar="NAME=EXPR",
        action="append",
        default=None,
        help="a function of the parameters to report with a delta-method interval, e.g. "
        "'wear_in_swaps=wear_cost/swap_cost' (+ - * / **, numbers, exp, log, sqrt; repeatable)",
    )
    _add_spec_overrides(est, learners)
    est.set_defaults(handler=_cmd_estimate)

    sens = sub.add_parser(
        "sensitivity",
        parents=[common],
        help="the estimates over a grid of discount factors (table and figure)",
        description=(
            "Estimate the model described by SPEC on DATA at each discount factor of "
            "--discounts and print each parameter's estimate and interval against the "
            "discount factor. The spec's model.discount is the assumed one (marked *)."
        ),
        epilog=_SENSITIVITY_EPILOG,
        formatter_class=_Formatter,
    )
    _add_data_and_spec(sens)
    sens.add_argument(
        "--discounts", required=True, type=_discount_list, metavar="LIST",
        help="discount factors in [0, 1) separated by commas, e.g. 0.9,0.95,0.99",
    )
    sens.add_argument("--json", metavar="OUT", default=None, help="write the table as JSON")
    sens.add_argument("--csv", metavar="OUT", default=None, help="write the table as CSV")
    sens.add_argument(
        "--plot", metavar="OUT", default=None,
        help="write the figure: each parameter against the discount factor (.png, .svg, .pdf)",
    )
    _add_spec_overrides(sens, learners)
    sens.set_defaults(handler=_cmd_sensitivity)

    cfp = sub.add_parser(
        "counterfactual",
        parents=[common],
        help="the estimated model re-solved at changed payoffs: shares, counts, welfare",
        description=(
            "Re-solve the model of SPEC, estimated on DATA, at changed flow payoffs and print "
            "the baseline, the counterfactual and their difference with intervals."
        ),
        epilog=_COUNTERFACTUAL_EPILOG,
        formatter_class=_Formatter,
    )
    _add_data_and_spec(cfp)
    cfp.add_argument("--set", metavar="PARAM=VALUE", action="append", default=None,
                     help="set a parameter to a counterfactual value (repeatable)")
    cfp.add_argument("--shift", metavar="CHOICE=UTILS", action="append", default=None,
                     help="add utils to a choice's payoff at every state (repeatable)")
    cfp.add_argument("--money", metavar="EXPR", default=None,
                     help="the utility of one unit of money as an expression of the parameters, "
                     "e.g. -price (adds the welfare in money)")
    cfp.add_argument("--averager", choices=("forest", "knn", "cells"), default="forest",
                     help="how the transitions are averaged (cells: discrete states)")
    cfp.add_argument("--results", metavar="JSON", default=None,
                     help="use this estimate (from 'orthoccp estimate --json') instead of "
                     "estimating first")
    cfp.add_argument("--json", metavar="OUT", default=None, help="write the table as JSON")
    cfp.add_argument("--csv", metavar="OUT", default=None, help="write the table as CSV")
    _add_spec_overrides(cfp, learners)
    cfp.set_defaults(handler=_cmd_counterfactual)

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
        _add_data_and_spec(cp)
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
            cp.add_argument(
                "--discounts", type=_discount_list, default=None, metavar="LIST",
                help="add the sensitivity to the discount factor at these values (e.g. "
                "0.9,0.95,0.99), with the first stage the report favours",
            )
            cp.add_argument(
                "--shift", metavar="CHOICE=UTILS", action="append", default=None,
                help="add a counterfactual section: utils added to a choice's payoff "
                "(repeatable), with the first stage the report favours",
            )
            cp.add_argument(
                "--set", metavar="PARAM=VALUE", action="append", default=None,
                help="add a counterfactual section: a parameter's counterfactual value "
                "(repeatable)",
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
        "scenario",
        metavar="SCENARIO",
        type=_scenario_name,
        help="one of: " + ", ".join(scenarios) + ", or a family design id such as F07",
    )
    mc.add_argument(
        "--reps", type=int, default=100, metavar="R", help="replications (default: 100)"
    )
    mc.add_argument(
        "--units",
        type=int,
        default=None,
        metavar="N",
        help="units per replication (default: 1000; a family design's own N)",
    )
    mc.add_argument(
        "--periods",
        type=int,
        default=None,
        metavar="T",
        help="periods per unit (default: 12; a family design's own T)",
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
        help="also write the coverage and interval-length plot (PNG)",
    )
    mc.set_defaults(handler=_cmd_montecarlo)
    return parser
